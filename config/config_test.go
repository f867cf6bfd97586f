package config

import (
	"bytes"
	"errors"
	"io"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"gopkg.in/yaml.v3"
)

// noEnv is an empty environment, so tests do not depend on the caller's.
func noEnv(string) (string, bool) { return "", false }

// envOf returns a lookup over m.
func envOf(m map[string]string) func(string) (string, bool) {
	return func(k string) (string, bool) { v, ok := m[k]; return v, ok }
}

// plain returns c without its origin record, for comparison with an
// expected Config.
func plain(c *Config) *Config {
	cp := *c
	cp.origin = nil
	return &cp
}

func TestDefaultValidates(t *testing.T) {
	if err := Default().Validate(); err != nil {
		t.Fatalf("Default().Validate() = %v", err)
	}
	c, err := LoadEnv("", noEnv)
	if err != nil {
		t.Fatalf("LoadEnv(\"\") = %v", err)
	}
	if !reflect.DeepEqual(plain(c), Default()) {
		t.Fatalf("LoadEnv(\"\") differs from Default():\n%s", c.Dump())
	}
	d := Default()
	if d.Source.Kind != "scenario" || d.Model.Mode != "explicit" || d.DataDir != "./data" ||
		d.Redis.Enabled || len(d.Kafka.Brokers) != 0 || d.HTTP.Listen != "" {
		t.Fatalf("Default() is not the zero-config demo: %+v", d)
	}
}

func TestGoodFiles(t *testing.T) {
	tests := map[string]func(c *Config){
		"empty.good.yaml": func(c *Config) {},
		"explicit.good.yaml": func(c *Config) {
			c.DataDir = "/var/lib/freshet"
			c.Model.Rank = 64
			c.Model.LearnRate = 0.005
			c.Model.Reg = 0.05
			c.Model.RatingMin = 0.5
			c.Model.RatingMax = 5
			c.Model.ErrorClip = 4
			c.Model.MaxUsers = 1_000_000
			c.Model.Seed = 42
			c.Monitor.Fading = 0.9995
			c.Monitor.Window = 50000
			c.Monitor.PageHinkley.Lambda = 25
			c.Monitor.ProgressInterval = 0
			c.Source.Kind = "file"
			c.Source.BatchSize = 1024
			c.Source.File.Path = "ratings.csv"
			c.Source.File.Format = "csv"
			c.Checkpoint.SnapshotInterval = time.Hour
			c.Checkpoint.KeepSnapshots = 3
			c.Log = Log{Level: "debug", Format: "json"}
			c.HTTP.Listen = "127.0.0.1:0"
		},
		"implicit.good.yaml": func(c *Config) {
			c.Model.Mode = "implicit"
			c.Model.Pairwise = true
			c.Model.Negatives = 1
			c.Monitor.ADWIN.Enabled = false
			c.Monitor.RecallTopN = 20
			c.Monitor.RecallRate = 0
			c.Source.Scenario.Events = 200000
			c.Source.Scenario.ShiftAt = 100000
			c.Source.Scenario.Rate = 0
			c.Source.Scenario.Noise = 0
			// redis: and checkpoint: ~ are null sections: defaults kept.
		},
		"production.good.yaml": func(c *Config) {
			c.Source.Kind = "kafka"
			c.Kafka.Brokers = []string{"kafka-1.internal:9093", "kafka-2.internal:9093"}
			c.Kafka.Topic = "listener-events"
			c.Kafka.Group = "freshet-prod"
			c.Kafka.DeadLetterTopic = "listener-events.rejects"
			c.Kafka.Start = "latest"
			c.Kafka.MaxWait = time.Second
			c.Kafka.SessionTimeout = 45 * time.Second
			c.Kafka.CreateTopics = true
			c.Kafka.Partitions = 12
			c.Kafka.Replication = 3
			c.Kafka.TLS = TLS{Enabled: true, CAFile: "/etc/freshet/ca.pem", ServerName: "kafka.internal"}
			c.Kafka.SASL = SASL{Mechanism: "scram-sha-512", Username: "freshet", PasswordEnv: "KAFKA_PASSWORD"}
			c.Redis.Enabled = true
			c.Redis.Addrs = []string{"redis-1.internal:6380", "redis-2.internal:6380", "redis-3.internal:6380"}
			c.Redis.Username = "freshet"
			c.Redis.PasswordFile = "/run/secrets/redis-password"
			c.Redis.TLS = TLS{Enabled: true, CertFile: "/etc/freshet/client.pem", KeyFile: "/etc/freshet/client-key.pem"}
			c.Redis.Prefix = "fr-prod"
			c.Redis.FlushRows = 20000
			c.Redis.Grace = 30 * time.Minute
			c.Redis.WriteTimeout = 2 * time.Second
		},
	}
	files, _ := filepath.Glob("testdata/*.good.yaml")
	if len(files) != len(tests) {
		t.Errorf("%d good files in testdata, %d in the table: keep them in step", len(files), len(tests))
	}
	for _, f := range files {
		name := filepath.Base(f)
		edit, ok := tests[name]
		if !ok {
			t.Errorf("%s has no entry in the table", name)
			continue
		}
		t.Run(name, func(t *testing.T) {
			got, err := LoadEnv(f, noEnv)
			if err != nil {
				t.Fatalf("LoadEnv(%s): %v", f, err)
			}
			want := Default()
			edit(want)
			if !reflect.DeepEqual(plain(got), want) {
				t.Errorf("LoadEnv(%s) =\n%s\nwant\n%s", f, got.Dump(), want.Dump())
			}
			// Dump is loadable and gives back the same configuration.
			again, err := ParseEnv([]byte(got.Dump()), "dump of "+name, noEnv)
			if err != nil {
				t.Fatalf("reloading Dump(): %v\n%s", err, got.Dump())
			}
			if !reflect.DeepEqual(plain(again), want) {
				t.Errorf("Dump round trip differs:\n%s", again.Dump())
			}
		})
	}
}

func TestBadFiles(t *testing.T) {
	// Each file must fail with every listed substring (file name, line, key
	// path and value), so several problems are reported at once where a file
	// has several.
	tests := map[string][]string{
		"unknown_key.bad.yaml": {`unknown_key.bad.yaml:3: unknown key "redis.adress" (did you mean "addrs"?)`},
		"learn_rate.bad.yaml":  {`learn_rate.bad.yaml:3: model.learn_rate must be in (0, 1], got 2.5`},
		"several.bad.yaml": {
			`several.bad.yaml:2: model.mode must be one of explicit, implicit, got "explicitt"`,
			`several.bad.yaml:3: model.rank must be in [1, 1024], got 0`,
			`several.bad.yaml:5: monitor.fading must be in (0, 1), got 1`,
			`several.bad.yaml:7: source.batch_size must be in [1, 100000], got 200000`,
			`several.bad.yaml:9: log.level must be one of debug, info, warn, error, got "verbose"`,
			`several.bad.yaml:10: unknown key "colour"`,
		},
		"int_fraction.bad.yaml":      {`int_fraction.bad.yaml:2: model.rank must be an integer, got "2.5"`},
		"duration_unitless.bad.yaml": {`duration_unitless.bad.yaml:2: checkpoint.flush_interval must be a duration such as "500ms" or "5s", got "5"`},
		"max_wait.bad.yaml":          {`max_wait.bad.yaml:2: kafka.max_wait must be in [250ms, 1s], got 100ms`},
		"inline_password.bad.yaml":   {`inline_password.bad.yaml:3: unknown key "redis.password": secrets are never written inline; use password_file or password_env`},
		"duplicate.bad.yaml":         {`duplicate.bad.yaml:3: duplicate key "model.rank" (first at line 2)`},
		// yaml.v3 places syntax errors at the line of the enclosing construct
		// (here line 1, "model:"), not at the unclosed "[" on line 2.
		"syntax.bad.yaml": {`syntax.bad.yaml:1: invalid YAML: did not find expected ',' or ']'`},
		"kafka_missing.bad.yaml": {
			`kafka_missing.bad.yaml:2: kafka.brokers is required when source.kind is kafka`,
			`kafka_missing.bad.yaml:2: kafka.topic is required when source.kind is kafka`,
		},
		"sasl.bad.yaml": {
			`sasl.bad.yaml:7: kafka.sasl.username is required when kafka.sasl.mechanism is "scram-sha-256"`,
			`sasl.bad.yaml:7: kafka.sasl.password_file or kafka.sasl.password_env is required when kafka.sasl.mechanism is "scram-sha-256"`,
		},
		"sasl_both.bad.yaml":         {`sasl_both.bad.yaml:6: kafka.sasl.password_env must not be set together with kafka.sasl.password_file (choose one), got "KAFKA_PASSWORD" and "/run/secrets/kafka"`},
		"pairwise_explicit.bad.yaml": {`pairwise_explicit.bad.yaml:3: model.pairwise needs model.mode implicit, got pairwise true with mode "explicit"`},
		"tls.bad.yaml": {
			`tls.bad.yaml:2: redis.tls.key_file and redis.tls.cert_file must be given together, got key_file "" and cert_file "/etc/client.pem"`,
			`tls.bad.yaml:3: redis.tls.ca_file is set but redis.tls.enabled is false`,
			`tls.bad.yaml:4: redis.tls.cert_file is set but redis.tls.enabled is false`,
		},
		"two_docs.bad.yaml":     {`two_docs.bad.yaml:3: more than one YAML document`},
		"not_mapping.bad.yaml":  {`not_mapping.bad.yaml:1: model must be a mapping of keys, got "5"`},
		"bool_yes.bad.yaml":     {`bool_yes.bad.yaml:2: redis.enabled must be true or false, got "yes"`},
		"list_scalar.bad.yaml":  {`list_scalar.bad.yaml:2: kafka.brokers must be a list of strings, got "k1:9092,k2:9092"`},
		"rating_scale.bad.yaml": {`rating_scale.bad.yaml:3: model.rating_max must be greater than model.rating_min (5), got 1`},
		"nan.bad.yaml":          {`nan.bad.yaml:2: model.learn_rate must be in (0, 1], got NaN`},
		"broker_port.bad.yaml":  {`broker_port.bad.yaml:4: kafka.brokers[1] must be host:port, got "k2"`},
		"file_path.bad.yaml": {
			`file_path.bad.yaml:4: source.file.format must be one of auto, jsonl, csv, tsv, got "parquet"`,
			`file_path.bad.yaml:2: source.file.path is required when source.kind is file`,
		},
		"shift.bad.yaml": {`shift.bad.yaml:4: source.scenario.shift_at must be 0 (no shift) or below source.scenario.events (1000), got 1000`},
		"prefix.bad.yaml": {
			`prefix.bad.yaml:3: redis.db must be 0 with several redis.addrs (a cluster has only database 0), got 2`,
			`prefix.bad.yaml:4: redis.prefix must be at most 64 characters without blanks or braces, got "{freshet}"`,
		},
	}
	files, _ := filepath.Glob("testdata/*.bad.yaml")
	if len(files) != len(tests) {
		t.Errorf("%d bad files in testdata, %d in the table: keep them in step", len(files), len(tests))
	}
	for _, f := range files {
		name := filepath.Base(f)
		wants, ok := tests[name]
		if !ok {
			t.Errorf("%s has no entry in the table", name)
			continue
		}
		t.Run(name, func(t *testing.T) {
			c, err := LoadEnv(f, noEnv)
			if err == nil {
				t.Fatalf("LoadEnv(%s) succeeded:\n%s", f, c.Dump())
			}
			if c != nil {
				t.Errorf("LoadEnv(%s) returned a Config with its error", f)
			}
			msg := err.Error()
			for _, w := range wants {
				if !strings.Contains(msg, w) {
					t.Errorf("error lacks %q; got:\n%s", w, msg)
				}
			}
			if n := len(Problems(err)); n != len(wants) {
				t.Errorf("got %d problems, want %d:\n%s", n, len(wants), msg)
			}
			for _, p := range Problems(err) {
				if !strings.HasPrefix(p.Error(), "config: "+f) {
					t.Errorf("problem %q does not start with the file name", p.Error())
				}
			}
			if strings.Contains(msg, "hunter2") {
				t.Errorf("error shows an inline secret: %s", msg)
			}
		})
	}
}

func TestValidateWithoutFile(t *testing.T) {
	c := Default()
	c.Model.Rank = 0
	c.Kafka.MaxWait = 100 * time.Millisecond
	err := c.Validate()
	want := "config: model.rank must be in [1, 1024], got 0\nconfig: kafka.max_wait must be in [250ms, 1s], got 100ms"
	if err == nil || err.Error() != want {
		t.Fatalf("Validate() = %v, want\n%s", err, want)
	}
	ps := Problems(err)
	if len(ps) != 2 || ps[0].Path != "model.rank" || ps[1].Path != "kafka.max_wait" {
		t.Fatalf("Problems = %+v", ps)
	}
}

func TestLoadMissingFile(t *testing.T) {
	_, err := LoadEnv(filepath.Join(t.TempDir(), "nope.yaml"), noEnv)
	if err == nil || !strings.Contains(err.Error(), "config: read ") || !os.IsNotExist(unwrapAll(err)) {
		t.Fatalf("LoadEnv(missing) = %v", err)
	}
}

func unwrapAll(err error) error {
	for {
		u, ok := err.(interface{ Unwrap() error })
		if !ok {
			return err
		}
		err = u.Unwrap()
	}
}

func TestWarnings(t *testing.T) {
	c := Default()
	c.Source.Kind = "kafka"
	c.Kafka.SASL.Mechanism = "plain"
	c.Redis.Enabled = true
	c.Redis.PasswordEnv = "REDIS_PW"
	w := strings.Join(c.Warnings(), "\n")
	for _, s := range []string{"kafka.sasl.mechanism is plain without kafka.tls.enabled", "redis has a password but redis.tls.enabled is false"} {
		if !strings.Contains(w, s) {
			t.Errorf("Warnings lack %q: %s", s, w)
		}
	}
	if got := Default().Warnings(); len(got) != 0 {
		t.Errorf("Default().Warnings() = %q, want none", got)
	}
}

// TestAgreesWithYAMLStrictDecode cross-checks the key-by-key decoder against
// yaml.v3's own strict decode (Decoder.KnownFields(true)) on the good files:
// both must give the same Config. The one intended difference is a section
// written with no keys ("redis:" or "checkpoint: ~"), which yaml.v3 resets to
// zero values and this package leaves at its defaults; implicit.good.yaml
// has such sections and is checked with them removed.
func TestAgreesWithYAMLStrictDecode(t *testing.T) {
	files, _ := filepath.Glob("testdata/*.good.yaml")
	for _, f := range files {
		data, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		var kept []string
		for _, line := range strings.Split(string(data), "\n") {
			if filepath.Base(f) != "implicit.good.yaml" || line != "redis:" && line != "checkpoint: ~" {
				kept = append(kept, line)
			}
		}
		data = []byte(strings.Join(kept, "\n"))
		ours, err := ParseEnv(data, f, noEnv)
		if err != nil {
			t.Fatalf("%s: %v", f, err)
		}
		theirs := Default()
		dec := yaml.NewDecoder(bytes.NewReader(data))
		dec.KnownFields(true)
		if err := dec.Decode(theirs); err != nil && !errors.Is(err, io.EOF) {
			t.Fatalf("%s: yaml.v3 strict decode: %v", f, err)
		}
		if !reflect.DeepEqual(plain(ours), theirs) {
			t.Errorf("%s: decoders disagree:\nours\n%s\nyaml.v3\n%s", f, ours.Dump(), theirs.Dump())
		}
	}
	// And yaml.v3's strict mode refuses the unknown key too.
	data, _ := os.ReadFile("testdata/unknown_key.bad.yaml")
	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	if err := dec.Decode(Default()); err == nil || !strings.Contains(err.Error(), "line 3") {
		t.Errorf("yaml.v3 strict decode of unknown_key.bad.yaml = %v, want an error at line 3", err)
	}
}
