package config

import (
	"reflect"
	"strings"
	"testing"
	"time"
)

func TestEnvNames(t *testing.T) {
	if got := EnvName("kafka.brokers"); got != "FRESHET_KAFKA_BROKERS" {
		t.Errorf("EnvName(kafka.brokers) = %q", got)
	}
	if got := EnvName("kafka.tls.ca_file"); got != "FRESHET_KAFKA_TLS_CA_FILE" {
		t.Errorf("EnvName(kafka.tls.ca_file) = %q", got)
	}
	// Underscores inside keys and between sections must never make two keys
	// share a variable.
	seen := map[string]string{}
	for _, k := range Keys() {
		if other, dup := seen[k.Env]; dup {
			t.Errorf("%s and %s share the variable %s", other, k.Path, k.Env)
		}
		seen[k.Env] = k.Path
	}
}

func TestApplyEnv(t *testing.T) {
	tests := []struct {
		name string
		env  map[string]string
		edit func(c *Config)
	}{
		{"list with blanks and a trailing comma",
			map[string]string{"FRESHET_KAFKA_BROKERS": " k1:9092, k2:9092 ,"},
			func(c *Config) { c.Kafka.Brokers = []string{"k1:9092", "k2:9092"} }},
		{"empty list",
			map[string]string{"FRESHET_REDIS_ADDRS": ""},
			func(c *Config) { c.Redis.Addrs = nil }},
		{"int float bool duration",
			map[string]string{
				"FRESHET_MODEL_RANK":                "64",
				"FRESHET_MODEL_LEARN_RATE":          "0.05",
				"FRESHET_REDIS_ENABLED":             "true",
				"FRESHET_CHECKPOINT_FLUSH_INTERVAL": "250ms",
			},
			func(c *Config) {
				c.Model.Rank = 64
				c.Model.LearnRate = 0.05
				c.Redis.Enabled = true
				c.Checkpoint.FlushInterval = 250 * time.Millisecond
			}},
		{"largest seed", map[string]string{"FRESHET_MODEL_SEED": "18446744073709551615"},
			func(c *Config) { c.Model.Seed = 18446744073709551615 }},
		{"decimal, not octal", map[string]string{"FRESHET_SOURCE_SCENARIO_COMMUNITIES": "010"},
			func(c *Config) { c.Source.Scenario.Communities = 10 }},
		{"nested section and top-level key",
			map[string]string{"FRESHET_MONITOR_PAGE_HINKLEY_LAMBDA": "80", "FRESHET_DATA_DIR": "/srv/freshet"},
			func(c *Config) { c.Monitor.PageHinkley.Lambda = 80; c.DataDir = "/srv/freshet" }},
		{"empty string", map[string]string{"FRESHET_KAFKA_GROUP": ""},
			func(c *Config) { c.Kafka.Group = "" }},
		{"unrelated variables are ignored", map[string]string{"FRESHET_NOPE": "1", "PATH": "/bin"},
			func(c *Config) {}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got := Default()
			if err := got.ApplyEnv(envOf(tt.env)); err != nil {
				t.Fatalf("ApplyEnv: %v", err)
			}
			want := Default()
			tt.edit(want)
			if !reflect.DeepEqual(plain(got), want) {
				t.Errorf("ApplyEnv(%v) =\n%s\nwant\n%s", tt.env, got.Dump(), want.Dump())
			}
		})
	}
}

func TestEnvOverridesFile(t *testing.T) {
	file := []byte("model:\n  rank: 16\n  learn_rate: 0.02\n")
	c, err := ParseEnv(file, "f.yaml", envOf(map[string]string{"FRESHET_MODEL_RANK": "48"}))
	if err != nil {
		t.Fatal(err)
	}
	if c.Model.Rank != 48 || c.Model.LearnRate != 0.02 {
		t.Fatalf("rank %d learn_rate %g, want 48 (env) and 0.02 (file)", c.Model.Rank, c.Model.LearnRate)
	}
}

func TestEnvErrors(t *testing.T) {
	tests := []struct {
		env  map[string]string
		want []string
	}{
		{map[string]string{"FRESHET_MODEL_RANK": "abc"},
			[]string{`config: env FRESHET_MODEL_RANK: model.rank must be an integer, got "abc"`}},
		// A value that parses but is out of range is placed at its variable,
		// not at the file line it overrode.
		{map[string]string{"FRESHET_MODEL_RANK": "0"},
			[]string{`config: env FRESHET_MODEL_RANK: model.rank must be in [1, 1024], got 0`}},
		{map[string]string{"FRESHET_REDIS_ENABLED": "maybe", "FRESHET_KAFKA_MAX_WAIT": "10ms"},
			[]string{
				`config: env FRESHET_REDIS_ENABLED: redis.enabled must be true or false, got "maybe"`,
				`config: env FRESHET_KAFKA_MAX_WAIT: kafka.max_wait must be in [250ms, 1s], got 10ms`,
			}},
		{map[string]string{"FRESHET_MONITOR_FADING": ""},
			[]string{`config: env FRESHET_MONITOR_FADING: monitor.fading must be a number, got ""`}},
		{map[string]string{"FRESHET_KAFKA_BROKERS": "k1:9092,k2"},
			[]string{`config: env FRESHET_KAFKA_BROKERS: kafka.brokers[1] must be host:port, got "k2"`}},
	}
	for _, tt := range tests {
		_, err := ParseEnv([]byte("model:\n  rank: 16\n"), "f.yaml", envOf(tt.env))
		if err == nil {
			t.Errorf("%v: no error", tt.env)
			continue
		}
		for _, w := range tt.want {
			if !strings.Contains(err.Error(), w) {
				t.Errorf("%v: error lacks %q; got:\n%v", tt.env, w, err)
			}
		}
		if n := len(Problems(err)); n != len(tt.want) {
			t.Errorf("%v: %d problems, want %d:\n%v", tt.env, n, len(tt.want), err)
		}
	}
}

func TestUnknownEnv(t *testing.T) {
	c := Default()
	c.Redis.PasswordEnv = "FRESHET_REDIS_SECRET"
	got := c.UnknownEnv([]string{"FRESHET_MODEL_RANK=3", "FRESHET_MODEL_RANC=3", "FRESHET_REDIS_SECRET=x", "HOME=/root"})
	if !reflect.DeepEqual(got, []string{"FRESHET_MODEL_RANC"}) {
		t.Fatalf("UnknownEnv = %q, want [FRESHET_MODEL_RANC]", got)
	}
}
