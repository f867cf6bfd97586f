package config

import (
	"errors"
	"fmt"
	"reflect"
	"strconv"
	"strings"
	"time"
)

// EnvPrefix starts the name of every environment override.
const EnvPrefix = "FRESHET_"

// EnvName returns the environment variable that overrides the key at path:
// EnvPrefix, then the path upper-cased with dots as underscores
// ("kafka.tls.ca_file" -> "FRESHET_KAFKA_TLS_CA_FILE").
func EnvName(path string) string {
	return EnvPrefix + strings.ToUpper(strings.ReplaceAll(path, ".", "_"))
}

// Key describes one configuration key.
type Key struct {
	// Path is the dotted key path, e.g. "redis.flush_interval".
	Path string
	// Env is the environment variable that overrides it.
	Env string
	// Type is "string", "bool", "int", "uint", "float", "duration" or "list".
	Type string
	// Default is the default value as it would be written in YAML ("" shows
	// as `""`, an empty list as []).
	Default string
}

// Keys lists every configuration key in file order, with its environment
// variable and default value.
func Keys() []Key {
	var ks []Key
	eachLeaf(reflect.ValueOf(Default()).Elem(), "", func(path string, v reflect.Value) {
		ks = append(ks, Key{Path: path, Env: EnvName(path), Type: typeName(v.Type()), Default: formatValue(v)})
	})
	return ks
}

// eachLeaf calls fn for every leaf key under the struct value v, in
// declaration order.
func eachLeaf(v reflect.Value, path string, fn func(path string, v reflect.Value)) {
	for _, f := range fieldsOf(v.Type()) {
		fv := v.Field(f.index)
		p := join(path, f.name)
		if isSection(fv.Type()) {
			eachLeaf(fv, p, fn)
		} else {
			fn(p, fv)
		}
	}
}

func typeName(t reflect.Type) string {
	if t == durationType {
		return "duration"
	}
	switch t.Kind() {
	case reflect.String:
		return "string"
	case reflect.Bool:
		return "bool"
	case reflect.Int, reflect.Int64:
		return "int"
	case reflect.Uint64:
		return "uint"
	case reflect.Float64:
		return "float"
	case reflect.Slice:
		return "list"
	}
	return t.String()
}

// formatValue writes a leaf value as it would appear in YAML.
func formatValue(v reflect.Value) string {
	if v.Type() == durationType {
		return formatDuration(time.Duration(v.Int()))
	}
	switch v.Kind() {
	case reflect.String:
		if v.String() == "" {
			return `""`
		}
		return v.String()
	case reflect.Bool:
		return strconv.FormatBool(v.Bool())
	case reflect.Int, reflect.Int64:
		return strconv.FormatInt(v.Int(), 10)
	case reflect.Uint64:
		return strconv.FormatUint(v.Uint(), 10)
	case reflect.Float64:
		return strconv.FormatFloat(v.Float(), 'g', -1, 64)
	case reflect.Slice:
		parts := make([]string, v.Len())
		for i := range parts {
			parts[i] = v.Index(i).String()
		}
		return "[" + strings.Join(parts, ", ") + "]"
	}
	return fmt.Sprint(v.Interface())
}

// ApplyEnv overrides keys from environment variables found by lookup (use
// os.LookupEnv for the process environment). Every key has one variable,
// named by EnvName: FRESHET_<SECTION>_<KEY>, for example
// FRESHET_MODEL_LEARN_RATE=0.02, FRESHET_KAFKA_BROKERS=k1:9092,k2:9092 (lists
// are comma-separated; blanks around items are dropped) or
// FRESHET_CHECKPOINT_FLUSH_INTERVAL=2s. A variable that is set but empty sets
// a string to "" and a list to empty, and is an error for other types.
// ApplyEnv reports every bad value and changes only the keys whose values are
// good. Secrets have no variable of their own: password_env names the
// variable that holds one.
func (c *Config) ApplyEnv(lookup func(string) (string, bool)) error {
	if c.origin == nil {
		c.origin = newOrigin("")
	}
	var errs []error
	eachLeaf(reflect.ValueOf(c).Elem(), "", func(path string, fv reflect.Value) {
		name := EnvName(path)
		s, ok := lookup(name)
		if !ok {
			return
		}
		if fv.Kind() == reflect.Slice {
			var list []string
			for _, it := range strings.Split(s, ",") {
				if it = strings.TrimSpace(it); it != "" {
					list = append(list, it)
				}
			}
			fv.Set(reflect.ValueOf(list))
		} else {
			tmp := reflect.New(fv.Type()).Elem()
			if err := setScalar(tmp, s, ""); err != nil {
				errs = append(errs, &Error{Env: name, Path: path,
					Msg: fmt.Sprintf("%s must be %s, got %q", path, want(fv.Type()), s)})
				return
			}
			fv.Set(tmp)
		}
		c.origin.env[path] = name
	})
	return errors.Join(errs...)
}

// UnknownEnv returns the variables in environ (os.Environ() form, NAME=value)
// that start with EnvPrefix but name no key, so that a caller can warn about
// misspelt overrides. Variables named by a password_env key are not reported.
func (c *Config) UnknownEnv(environ []string) []string {
	known := map[string]bool{}
	for _, k := range Keys() {
		known[k.Env] = true
	}
	known[c.Kafka.SASL.PasswordEnv] = true
	known[c.Redis.PasswordEnv] = true
	var out []string
	for _, kv := range environ {
		name, _, _ := strings.Cut(kv, "=")
		if strings.HasPrefix(name, EnvPrefix) && !known[name] {
			out = append(out, name)
		}
	}
	return out
}

// formatDuration is Duration.String without zero tails: "5m", not "5m0s".
func formatDuration(d time.Duration) string {
	s := d.String()
	if strings.HasSuffix(s, "m0s") {
		s = strings.TrimSuffix(s, "0s")
	}
	if strings.HasSuffix(s, "h0m") {
		s = strings.TrimSuffix(s, "0m")
	}
	return s
}
