package stream

import (
	"bytes"
	"flag"
	"math"
	"os"
	"path/filepath"
	"testing"
)

var update = flag.Bool("update", false, "rewrite the sample event files in ../testdata/events")

// sampleFiles are the replay fixtures shared with other packages, generated
// from the demo scenario. Regenerate with go test ./stream -run SampleFiles -update.
var sampleFiles = []struct {
	name string
	opts ScenarioOptions
}{
	{"podcast-ratings-seed1.jsonl", ScenarioOptions{Seed: 1, Events: 2000, Listeners: 200, Shows: 40, ShiftAt: 1500,
		ClipMin: 0.5, ClipMax: 5, Step: 0.5}},
	{"podcast-plays-seed2.jsonl", ScenarioOptions{Seed: 2, Events: 1000, Listeners: 100, Shows: 30, Implicit: true}},
}

// TestSampleFiles checks that the checked-in sample files are what the
// scenario generates. Values are compared within 1e-12 rather than byte for
// byte, since a fused multiply-add on another architecture may change the
// last digit of a continuous value.
func TestSampleFiles(t *testing.T) {
	for _, sf := range sampleFiles {
		t.Run(sf.name, func(t *testing.T) {
			var buf bytes.Buffer
			if _, err := newScenario(t, sf.opts, Position{}).WriteTo(&buf); err != nil {
				t.Fatal(err)
			}
			path := filepath.Join("..", "testdata", "events", sf.name)
			if *update {
				if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
					t.Fatal(err)
				}
				if err := os.WriteFile(path, buf.Bytes(), 0o644); err != nil {
					t.Fatal(err)
				}
			}
			want, _, _ := drain(t, open(t, FileOptions{Path: path, Decode: DecodeOptions{Implicit: sf.opts.Implicit, RequireTime: true}}, Position{}))
			tmp := filepath.Join(t.TempDir(), sf.name)
			if err := os.WriteFile(tmp, buf.Bytes(), 0o644); err != nil {
				t.Fatal(err)
			}
			got, _, _ := drain(t, open(t, FileOptions{Path: tmp, Decode: DecodeOptions{Implicit: sf.opts.Implicit, RequireTime: true}}, Position{}))
			if len(got) != len(want) || len(got) != int(sf.opts.Events) {
				t.Fatalf("generated %d events, file has %d, want %d", len(got), len(want), sf.opts.Events)
			}
			for i := range got {
				g, w := got[i], want[i]
				if math.Abs(g.Value-w.Value) > 1e-12 {
					t.Fatalf("event %d: value %v, file has %v", i, g.Value, w.Value)
				}
				g.Value, g.Offset, w.Value, w.Offset = 0, 0, 0, 0
				if g != w {
					t.Fatalf("event %d: generated %+v, file has %+v (run with -update after a deliberate change)", i, g, w)
				}
			}
		})
	}
}

// TestSampleCSV reads the hand-written CSV fixture, which mixes valid rows,
// quoting, CRLF endings and bad rows.
func TestSampleCSV(t *testing.T) {
	var rec recorder
	path := filepath.Join("..", "testdata", "events", "mixed.csv")
	evs, pos, rejected := drain(t, open(t, FileOptions{Path: path, Decode: DecodeOptions{MinValue: 0.5, MaxValue: 5}, Rejects: &rec}, Position{}))
	if len(evs) != 6 || rejected != 5 {
		t.Fatalf("%d events and %d rejects, want 6 and 5", len(evs), rejected)
	}
	wantFields := []string{"value", "user", "time", "", "kind"}
	for i, r := range rec.got {
		if r.Err.Field != wantFields[i] {
			t.Fatalf("reject %d (%s) names field %q, want %q", i, r.Err, r.Err.Field, wantFields[i])
		}
	}
	if evs[2].User != "listener, the third" || evs[3].Kind != EraseUser || evs[5].Time != 1767225660000 {
		t.Fatalf("events %+v", evs)
	}
	if pos[len(pos)-1].Line != 14 {
		t.Fatalf("final line %d, want 14", pos[len(pos)-1].Line)
	}
}
