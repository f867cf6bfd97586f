package config

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

const (
	redisSecret = "s3cr3t-redis-PW"
	kafkaSecret = "k4fka-SCRAM-pw"
)

// resolved returns a Config using both secrets, resolved from a file and a
// variable.
func resolved(t *testing.T) *Config {
	t.Helper()
	dir := t.TempDir()
	pw := filepath.Join(dir, "redis-password")
	if err := os.WriteFile(pw, []byte(redisSecret+"\r\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	text := fmt.Sprintf(`source:
  kind: kafka
kafka:
  brokers: [127.0.0.1:9092]
  topic: plays
  tls: {enabled: true}
  sasl:
    mechanism: scram-sha-256
    username: freshet
    password_env: TEST_KAFKA_PW
redis:
  enabled: true
  password_file: %q
  tls: {enabled: true}
`, pw)
	env := envOf(map[string]string{"TEST_KAFKA_PW": kafkaSecret})
	c, err := ParseEnv([]byte(text), "secrets.yaml", env)
	if err != nil {
		t.Fatal(err)
	}
	if err := c.ResolveSecrets(env); err != nil {
		t.Fatal(err)
	}
	return c
}

func TestResolveSecrets(t *testing.T) {
	c := resolved(t)
	if got := c.Redis.Password.Reveal(); got != redisSecret {
		t.Errorf("redis password = %q, want %q (CRLF dropped)", got, redisSecret)
	}
	if got := c.Kafka.SASL.Password.Reveal(); got != kafkaSecret {
		t.Errorf("kafka password = %q, want %q", got, kafkaSecret)
	}
}

func TestSecretsNeverPrinted(t *testing.T) {
	c := resolved(t)
	js, err := json.Marshal(c)
	if err != nil {
		t.Fatal(err)
	}
	outputs := map[string]string{
		"Dump":    c.Dump(),
		"String":  c.String(),
		"json":    string(js),
		"%v ptr":  fmt.Sprintf("%v", c),
		"%v val":  fmt.Sprintf("%v", *c),
		"%+v sec": fmt.Sprintf("%+v", c.Redis),
		"%#v sec": fmt.Sprintf("%#v", c.Redis),
		"%#v cfg": fmt.Sprintf("%#v", *c),
		"%s":      fmt.Sprintf("%s", c.Kafka.SASL.Password),
		"%q":      fmt.Sprintf("%q", c.Kafka.SASL.Password),
		"%x":      fmt.Sprintf("%x", c.Kafka.SASL.Password),
		"%d":      fmt.Sprintf("%d", c.Kafka.SASL.Password),
		"%10.3s":  fmt.Sprintf("%10.3s", c.Kafka.SASL.Password),
		"Println": fmt.Sprintln(c.Kafka.SASL, c.Redis.Password),
	}
	for name, out := range outputs {
		for _, secret := range []string{redisSecret, kafkaSecret, fmt.Sprintf("%x", redisSecret), fmt.Sprintf("%x", kafkaSecret)} {
			if strings.Contains(out, secret) {
				t.Errorf("%s shows a secret:\n%s", name, out)
			}
		}
	}
	if !strings.Contains(outputs["%+v sec"], redacted) {
		t.Errorf("%%+v of the redis section does not mark the password as redacted: %s", outputs["%+v sec"])
	}
	// Dump names where the secrets come from.
	if !strings.Contains(c.Dump(), "password_env: TEST_KAFKA_PW") {
		t.Errorf("Dump lacks the variable name:\n%s", c.Dump())
	}
	if s := NewSecret("").String(); s != "" {
		t.Errorf("empty secret prints %q, want \"\"", s)
	}
}

func TestResolveSecretsErrors(t *testing.T) {
	dir := t.TempDir()
	empty := filepath.Join(dir, "empty")
	if err := os.WriteFile(empty, []byte("\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	text := fmt.Sprintf(`source:
  kind: kafka
kafka:
  brokers: [127.0.0.1:9092]
  topic: plays
  sasl:
    mechanism: plain
    username: freshet
    password_env: UNSET_VARIABLE
redis:
  enabled: true
  password_file: %q
`, empty)
	c, err := ParseEnv([]byte(text), "s.yaml", noEnv)
	if err != nil {
		t.Fatal(err)
	}
	err = c.ResolveSecrets(noEnv)
	for _, w := range []string{
		`config: s.yaml:9: kafka.sasl.password_env: the environment variable UNSET_VARIABLE is not set or empty`,
		`config: s.yaml:12: redis.password_file: the file "` + empty + `" is empty`,
	} {
		if err == nil || !strings.Contains(err.Error(), w) {
			t.Errorf("ResolveSecrets error lacks %q; got %v", w, err)
		}
	}
	// Unused sections are not resolved: with redis off and another source
	// kind, nothing is read.
	d := Default()
	d.Redis.PasswordFile = filepath.Join(dir, "missing")
	if err := d.ResolveSecrets(noEnv); err != nil {
		t.Errorf("ResolveSecrets on unused sections = %v", err)
	}
}
