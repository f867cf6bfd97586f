package config

import (
	"bytes"
	"errors"
	"fmt"
	"os"
	"strings"

	"gopkg.in/yaml.v3"
)

// redacted is what a set Secret prints as, in every format.
const redacted = "[redacted]"

// Secret holds a password or token. Every way of printing or encoding it
// (fmt verbs including %#v, YAML, JSON, text) yields "[redacted]", or "" when
// empty; only Reveal returns the value.
type Secret struct {
	v string
}

// NewSecret wraps s.
func NewSecret(s string) Secret { return Secret{v: s} }

// Reveal returns the secret itself, for handing to a client library.
func (s Secret) Reveal() string { return s.v }

// IsSet reports whether the secret is non-empty.
func (s Secret) IsSet() bool { return s.v != "" }

func (s Secret) shown() string {
	if s.v == "" {
		return ""
	}
	return redacted
}

// String returns "[redacted]" (or "" when empty).
func (s Secret) String() string { return s.shown() }

// GoString returns "[redacted]" (or "" when empty).
func (s Secret) GoString() string { return s.shown() }

// Format writes "[redacted]" (or nothing when empty) for every verb, so that
// no verb, flag or width reveals the value.
func (s Secret) Format(f fmt.State, _ rune) { _, _ = f.Write([]byte(s.shown())) }

// MarshalYAML encodes the redacted form.
func (s Secret) MarshalYAML() (any, error) { return s.shown(), nil }

// MarshalJSON encodes the redacted form.
func (s Secret) MarshalJSON() ([]byte, error) { return []byte(`"` + s.shown() + `"`), nil }

// MarshalText encodes the redacted form.
func (s Secret) MarshalText() ([]byte, error) { return []byte(s.shown()), nil }

// ResolveSecrets reads the secrets of the sections in use (Kafka when
// source.kind is kafka and SASL is on; Redis when enabled) from their
// password_file or password_env into the Password fields. A file's content
// loses one trailing newline (\n or \r\n); an empty secret is an error.
// lookup reads environment variables (os.LookupEnv). Error messages name the
// key and the file or variable, never the value.
func (c *Config) ResolveSecrets(lookup func(string) (string, bool)) error {
	var errs []error
	read := func(path, file, env string) (Secret, bool) {
		var s string
		switch {
		case file != "":
			b, err := os.ReadFile(file)
			if err != nil {
				errs = append(errs, c.origin.locate(path+"_file", fmt.Sprintf("%s_file: cannot read the secret: %v", path, err)))
				return Secret{}, false
			}
			s = strings.TrimSuffix(strings.TrimSuffix(string(b), "\n"), "\r")
			if s == "" {
				errs = append(errs, c.origin.locate(path+"_file", fmt.Sprintf("%s_file: the file %q is empty", path, file)))
				return Secret{}, false
			}
		case env != "":
			v, ok := lookup(env)
			if !ok || v == "" {
				errs = append(errs, c.origin.locate(path+"_env", fmt.Sprintf("%s_env: the environment variable %s is not set or empty", path, env)))
				return Secret{}, false
			}
			s = v
		default:
			return Secret{}, true
		}
		return NewSecret(s), true
	}
	if c.Source.Kind == "kafka" && c.Kafka.SASL.Mechanism != "" {
		if s, ok := read("kafka.sasl.password", c.Kafka.SASL.PasswordFile, c.Kafka.SASL.PasswordEnv); ok {
			c.Kafka.SASL.Password = s
		}
	}
	if c.Redis.Enabled {
		if s, ok := read("redis.password", c.Redis.PasswordFile, c.Redis.PasswordEnv); ok {
			c.Redis.Password = s
		}
	}
	return errors.Join(errs...)
}

// Dump returns the effective configuration as YAML, every key included, for a
// check-only run or a startup log. Secrets never appear: only the names of the
// files or variables that hold them. Loading the output gives back an equal
// configuration.
func (c *Config) Dump() string {
	var b bytes.Buffer
	enc := yaml.NewEncoder(&b)
	enc.SetIndent(2)
	if err := enc.Encode(c); err != nil {
		// Not reachable for this struct; say so rather than print nothing.
		return "# cannot encode configuration: " + err.Error() + "\n"
	}
	_ = enc.Close()
	return b.String()
}

// String returns Dump(), so printing a Config with %v or %s never shows a
// secret.
func (c Config) String() string { return c.Dump() }
