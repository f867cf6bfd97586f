package config

import (
	"os"
	"path/filepath"
	"reflect"
	"regexp"
	"strings"
	"testing"
)

// TestShippedExamples loads and validates every configuration shipped under
// deploy/.
func TestShippedExamples(t *testing.T) {
	files, _ := filepath.Glob("../deploy/*.yaml")
	more, _ := filepath.Glob("../deploy/examples/*.yaml")
	files = append(files, more...)
	if len(files) < 5 {
		t.Fatalf("found %d shipped configs (%v), want the example and at least four under deploy/examples", len(files), files)
	}
	env := envOf(map[string]string{"KAFKA_SASL_PASSWORD": "x"})
	for _, f := range files {
		t.Run(filepath.Base(f), func(t *testing.T) {
			c, err := LoadEnv(f, env)
			if err != nil {
				t.Fatalf("LoadEnv(%s): %v", f, err)
			}
			if w := c.Warnings(); len(w) != 0 {
				t.Errorf("shipped config has warnings: %q", w)
			}
		})
	}
}

// TestExampleIsDefault checks that deploy/freshet.example.yaml lists every
// key and that its values are exactly the defaults.
func TestExampleIsDefault(t *testing.T) {
	c, err := LoadEnv("../deploy/freshet.example.yaml", nil)
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(plain(c), Default()) {
		t.Errorf("freshet.example.yaml differs from Default():\n%s", c.Dump())
	}
	for _, k := range Keys() {
		if _, ok := c.origin.lines[k.Path]; !ok {
			t.Errorf("freshet.example.yaml lacks the key %s", k.Path)
		}
	}
}

// TestDocKeyTable checks that the key table in the package doc lists every
// key, in order, with its true default.
func TestDocKeyTable(t *testing.T) {
	src, err := os.ReadFile("doc.go")
	if err != nil {
		t.Fatal(err)
	}
	row := regexp.MustCompile(`^//\t([a-z_]+(?:\.[a-z_]+)*)\s+(\S+)\s+\S`)
	var got []Key
	for _, line := range strings.Split(string(src), "\n") {
		if m := row.FindStringSubmatch(line); m != nil && m[1] != "key" {
			got = append(got, Key{Path: m[1], Default: m[2]})
		}
	}
	keys := Keys()
	if len(got) != len(keys) {
		t.Errorf("doc table has %d rows, there are %d keys", len(got), len(keys))
	}
	for i := 0; i < min(len(got), len(keys)); i++ {
		if got[i].Path != keys[i].Path || got[i].Default != keys[i].Default {
			t.Errorf("doc row %d is %s %s, want %s %s", i+1, got[i].Path, got[i].Default, keys[i].Path, keys[i].Default)
		}
	}
}

// FuzzParse checks that no input makes Parse panic, and that what it accepts
// validates and survives a Dump round trip.
func FuzzParse(f *testing.F) {
	files, _ := filepath.Glob("testdata/*.yaml")
	for _, p := range files {
		if b, err := os.ReadFile(p); err == nil {
			f.Add(b)
		}
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		c, err := ParseEnv(data, "fuzz.yaml", nil)
		if err != nil {
			if c != nil {
				t.Fatal("Config returned with an error")
			}
			return
		}
		if err := c.Validate(); err != nil {
			t.Fatalf("accepted config does not validate: %v", err)
		}
		again, err := ParseEnv([]byte(c.Dump()), "dump", nil)
		if err != nil {
			t.Fatalf("Dump of an accepted config does not load: %v\n%s", err, c.Dump())
		}
		if !reflect.DeepEqual(plain(again), plain(c)) {
			t.Fatalf("Dump round trip differs")
		}
	})
}
