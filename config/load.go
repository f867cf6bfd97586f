package config

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"reflect"
	"regexp"
	"strconv"
	"strings"
	"time"

	"gopkg.in/yaml.v3"
)

// Error is one configuration problem. Validate, Load, Parse and ApplyEnv
// return every problem they find, joined with errors.Join; use errors.As or
// the Unwrap() []error method of the joined error to get each *Error.
type Error struct {
	// File is the configuration file's name as given ("" for none).
	File string
	// Line is the line of the key in File, when known (0 otherwise).
	Line int
	// Env is the environment variable that set the key, when it came from one.
	Env string
	// Path is the dotted key path, e.g. "model.learn_rate" ("" for problems
	// with the document as a whole).
	Path string
	// Msg is the whole problem statement, starting with the key path.
	Msg string
}

func (e *Error) Error() string {
	var b strings.Builder
	b.WriteString("config: ")
	switch {
	case e.Env != "":
		b.WriteString("env " + e.Env + ": ")
	case e.File != "" && e.Line > 0:
		b.WriteString(e.File + ":" + strconv.Itoa(e.Line) + ": ")
	case e.File != "":
		b.WriteString(e.File + ": ")
	}
	b.WriteString(e.Msg)
	return b.String()
}

// origin records where each key of a Config was set.
type origin struct {
	name  string
	lines map[string]int    // key path -> line of the key in the file
	env   map[string]string // key path -> environment variable that set it
}

// locate returns an *Error for path, placed at the most precise location
// known: the environment variable that set path, else the line of path, else
// the line of its nearest enclosing section.
func (o *origin) locate(path, msg string) *Error {
	e := &Error{Path: path, Msg: msg}
	if o == nil {
		return e
	}
	e.File = o.name
	base, _, _ := strings.Cut(path, "[") // "kafka.brokers[1]" -> "kafka.brokers"
	if v, ok := o.env[base]; ok {
		e.Env = v
		return e
	}
	if l, ok := o.lines[path]; ok {
		e.Line = l
		return e
	}
	for p := base; p != ""; {
		if l, ok := o.lines[p]; ok {
			e.Line = l
			break
		}
		i := strings.LastIndexByte(p, '.')
		if i < 0 {
			break
		}
		p = p[:i]
	}
	return e
}

func newOrigin(name string) *origin {
	return &origin{name: name, lines: map[string]int{}, env: map[string]string{}}
}

// Load reads the configuration file at path and returns the effective
// configuration: Default, then the file's keys (strictly: unknown keys and
// values of the wrong type are errors), then the FRESHET_* environment
// overrides from the process environment, then Validate. An empty path means
// no file: the defaults with the environment overrides. Secrets are not read;
// call ResolveSecrets for that.
func Load(path string) (*Config, error) {
	return LoadEnv(path, os.LookupEnv)
}

// LoadEnv is Load with the environment given by lookup (nil: no overrides).
func LoadEnv(path string, lookup func(string) (string, bool)) (*Config, error) {
	if path == "" {
		return ParseEnv(nil, "", lookup)
	}
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("config: read %s: %w", path, err)
	}
	return ParseEnv(data, path, lookup)
}

// Parse is Load for configuration text already in memory; name is used in
// messages (normally the file name).
func Parse(data []byte, name string) (*Config, error) {
	return ParseEnv(data, name, os.LookupEnv)
}

// ParseEnv is Parse with the environment given by lookup (nil: no overrides).
func ParseEnv(data []byte, name string, lookup func(string) (string, bool)) (*Config, error) {
	c := Default()
	c.origin = newOrigin(name)
	// A key that fails to decode keeps its previous value, so the later steps
	// still run and every problem is reported in one pass.
	errs := []error{c.decode(data)}
	if lookup != nil {
		errs = append(errs, c.ApplyEnv(lookup))
	}
	errs = append(errs, c.Validate())
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	return c, nil
}

var yamlLine = regexp.MustCompile(`^yaml: line (\d+): (.*)$`)

// decode applies the keys of one YAML document to c. Keys absent from the
// document keep their current values; a section written with no keys (null)
// keeps its values too. Every unknown key, duplicate key and badly typed value
// is reported.
//
// decode walks the yaml.v3 node tree against the Config struct instead of
// calling Decoder.KnownFields(true): the strict decoder refuses the same
// unknown keys, but names them by Go type ("field adress not found in type
// config.Redis") and silently truncates 2.5 into an integer field. Walking the
// nodes gives the full key path, the line of every key for Validate, and all
// problems in one pass. A test checks that both decoders agree on the good
// files.
func (c *Config) decode(data []byte) error {
	o := c.origin
	dec := yaml.NewDecoder(bytes.NewReader(data))
	var doc yaml.Node
	if err := dec.Decode(&doc); err != nil {
		if errors.Is(err, io.EOF) {
			return nil // empty file: defaults
		}
		e := &Error{File: o.name, Msg: "invalid YAML: " + strings.TrimPrefix(err.Error(), "yaml: ")}
		if m := yamlLine.FindStringSubmatch(err.Error()); m != nil {
			e.Line, _ = strconv.Atoi(m[1])
			e.Msg = "invalid YAML: " + m[2]
		}
		return e
	}
	var extra yaml.Node
	if err := dec.Decode(&extra); !errors.Is(err, io.EOF) {
		e := &Error{File: o.name, Msg: "more than one YAML document (one configuration per file)"}
		if err == nil {
			e.Line = extra.Line
		}
		return e
	}
	root := &doc
	if root.Kind == yaml.DocumentNode && len(root.Content) == 1 {
		root = root.Content[0]
	}
	var errs []error
	d := decoder{o: o, errs: &errs}
	d.section(root, reflect.ValueOf(c).Elem(), "")
	return errors.Join(errs...)
}

type decoder struct {
	o    *origin
	errs *[]error
}

func (d decoder) fail(line int, path, msg string) {
	*d.errs = append(*d.errs, &Error{File: d.o.name, Line: line, Path: path, Msg: msg})
}

func deref(n *yaml.Node) *yaml.Node {
	for n.Kind == yaml.AliasNode && n.Alias != nil {
		n = n.Alias
	}
	return n
}

func isNull(n *yaml.Node) bool {
	return n.Kind == yaml.ScalarNode && n.ShortTag() == "!!null"
}

// field is one YAML key of a struct type.
type field struct {
	name  string
	index int
}

// fieldsOf lists the YAML keys of struct type t, in declaration order.
func fieldsOf(t reflect.Type) []field {
	var fs []field
	for i := 0; i < t.NumField(); i++ {
		sf := t.Field(i)
		if !sf.IsExported() {
			continue
		}
		tag := strings.Split(sf.Tag.Get("yaml"), ",")[0]
		if tag == "-" || tag == "" {
			continue
		}
		fs = append(fs, field{name: tag, index: i})
	}
	return fs
}

var durationType = reflect.TypeFor[time.Duration]()

// isSection reports whether values of t are YAML mappings of further keys.
func isSection(t reflect.Type) bool { return t.Kind() == reflect.Struct }

func join(path, key string) string {
	if path == "" {
		return key
	}
	return path + "." + key
}

func (d decoder) section(n *yaml.Node, v reflect.Value, path string) {
	n = deref(n)
	if isNull(n) {
		return
	}
	if n.Kind != yaml.MappingNode {
		what := path
		if what == "" {
			what = "the document"
		}
		d.fail(n.Line, path, fmt.Sprintf("%s must be a mapping of keys, got %s", what, describeNode(n)))
		return
	}
	fs := fieldsOf(v.Type())
	seen := map[string]int{}
	for i := 0; i+1 < len(n.Content); i += 2 {
		k, val := deref(n.Content[i]), n.Content[i+1]
		if k.Kind != yaml.ScalarNode {
			d.fail(k.Line, path, fmt.Sprintf("keys must be plain names, got %s", describeNode(k)))
			continue
		}
		full := join(path, k.Value)
		if k.Value == "<<" {
			d.fail(k.Line, full, "merge keys (<<) are not supported; write the keys out")
			continue
		}
		if first, dup := seen[k.Value]; dup {
			d.fail(k.Line, full, fmt.Sprintf("duplicate key %q (first at line %d)", full, first))
			continue
		}
		seen[k.Value] = k.Line
		idx := -1
		for _, f := range fs {
			if f.name == k.Value {
				idx = f.index
				break
			}
		}
		if idx < 0 {
			d.fail(k.Line, full, unknownKey(full, k.Value, fs))
			continue
		}
		d.o.lines[full] = k.Line
		fv := v.Field(idx)
		if isSection(fv.Type()) {
			d.section(val, fv, full)
		} else {
			d.leaf(val, fv, full)
		}
	}
}

// unknownKey words the error for key (at full path) that is not one of fs,
// suggesting a near miss.
func unknownKey(full, key string, fs []field) string {
	msg := fmt.Sprintf("unknown key %q", full)
	if key == "password" {
		return msg + ": secrets are never written inline; use password_file or password_env"
	}
	// Suggest the nearest key when it is within about a third of the typed
	// key's length in edits.
	best, bestD := "", 2+len(key)/3
	for _, f := range fs {
		if dd := editDistance(key, f.name); dd < bestD {
			best, bestD = f.name, dd
		}
	}
	if best != "" {
		msg += fmt.Sprintf(" (did you mean %q?)", best)
	}
	return msg
}

// editDistance is the Levenshtein distance between a and b.
func editDistance(a, b string) int {
	prev := make([]int, len(b)+1)
	cur := make([]int, len(b)+1)
	for j := range prev {
		prev[j] = j
	}
	for i := 1; i <= len(a); i++ {
		cur[0] = i
		for j := 1; j <= len(b); j++ {
			cost := 1
			if a[i-1] == b[j-1] {
				cost = 0
			}
			cur[j] = min(prev[j]+1, cur[j-1]+1, prev[j-1]+cost)
		}
		prev, cur = cur, prev
	}
	return prev[len(b)]
}

// describeNode says what a node is, for messages.
func describeNode(n *yaml.Node) string {
	switch n.Kind {
	case yaml.MappingNode:
		return "a mapping"
	case yaml.SequenceNode:
		return "a list"
	case yaml.ScalarNode:
		if isNull(n) {
			return "nothing (null)"
		}
		return strconv.Quote(n.Value)
	}
	return "an unsupported YAML node"
}

// want describes the values a leaf of type t accepts.
func want(t reflect.Type) string {
	if t == durationType {
		return `a duration such as "500ms" or "5s"`
	}
	switch t.Kind() {
	case reflect.String:
		return "a string"
	case reflect.Bool:
		return "true or false"
	case reflect.Int, reflect.Int64:
		return "an integer"
	case reflect.Uint64:
		return "a non-negative integer"
	case reflect.Float64:
		return "a number"
	case reflect.Slice:
		return "a list of strings"
	}
	return t.String()
}

// leaf decodes one value node into fv. The typing is stricter than yaml.v3's
// own: an integer key refuses 2.5 (which yaml.v3 would truncate), a boolean
// key refuses yes/no, a duration needs a unit.
func (d decoder) leaf(n *yaml.Node, fv reflect.Value, path string) {
	n = deref(n)
	bad := func() {
		d.fail(n.Line, path, fmt.Sprintf("%s must be %s, got %s", path, want(fv.Type()), describeNode(n)))
	}
	if fv.Kind() == reflect.Slice {
		if isNull(n) {
			fv.Set(reflect.Zero(fv.Type()))
			return
		}
		if n.Kind != yaml.SequenceNode {
			bad()
			return
		}
		list := make([]string, 0, len(n.Content))
		for i, it := range n.Content {
			it = deref(it)
			d.o.lines[path+"["+strconv.Itoa(i)+"]"] = it.Line
			if it.Kind != yaml.ScalarNode || isNull(it) {
				d.fail(it.Line, path, fmt.Sprintf("%s must be a list of strings, got an item that is %s", path, describeNode(it)))
				return
			}
			list = append(list, it.Value)
		}
		if len(list) == 0 {
			list = nil // [] and no key at all mean the same: an empty list
		}
		fv.Set(reflect.ValueOf(list))
		return
	}
	if n.Kind != yaml.ScalarNode {
		bad()
		return
	}
	if isNull(n) {
		fv.Set(reflect.Zero(fv.Type()))
		return
	}
	tag := n.ShortTag()
	if err := setScalar(fv, n.Value, tag); err != nil {
		bad()
	}
}

var errType = errors.New("wrong type")

// setScalar parses s into fv. tag is the YAML tag the value resolved to, or ""
// for text from the environment (where only the field's type decides).
func setScalar(fv reflect.Value, s, tag string) error {
	t := fv.Type()
	if t == durationType {
		if tag != "" && tag != "!!str" {
			return errType
		}
		dd, err := time.ParseDuration(strings.TrimSpace(s))
		if err != nil {
			return err
		}
		fv.SetInt(int64(dd))
		return nil
	}
	switch t.Kind() {
	case reflect.String:
		fv.SetString(s)
	case reflect.Bool:
		if tag != "" && tag != "!!bool" {
			return errType
		}
		b, err := strconv.ParseBool(strings.TrimSpace(s))
		if err != nil {
			return err
		}
		fv.SetBool(b)
	case reflect.Int, reflect.Int64:
		if tag != "" && tag != "!!int" {
			return errType
		}
		i, err := strconv.ParseInt(strings.TrimSpace(s), intBase(tag), t.Bits())
		if err != nil {
			return err
		}
		fv.SetInt(i)
	case reflect.Uint64:
		if tag != "" && tag != "!!int" {
			return errType
		}
		u, err := strconv.ParseUint(strings.TrimSpace(s), intBase(tag), 64)
		if err != nil {
			return err
		}
		fv.SetUint(u)
	case reflect.Float64:
		if tag != "" && tag != "!!int" && tag != "!!float" {
			return errType
		}
		f, err := parseFloat(s)
		if err != nil {
			return err
		}
		fv.SetFloat(f)
	default:
		return errType
	}
	return nil
}

// intBase is the base for integer text: YAML integers may carry a 0x/0o/0b
// prefix (the YAML resolver has already recognised them); environment values
// are plain decimal, so "010" means ten.
func intBase(tag string) int {
	if tag == "" {
		return 10
	}
	return 0
}

// parseFloat accepts Go float syntax and YAML's .inf/.nan spellings (which
// Validate then refuses with a clear message).
func parseFloat(s string) (float64, error) {
	s = strings.TrimSpace(s)
	switch strings.ToLower(s) {
	case ".inf", "+.inf":
		return math.Inf(1), nil
	case "-.inf":
		return math.Inf(-1), nil
	case ".nan":
		return math.NaN(), nil
	}
	return strconv.ParseFloat(strings.ReplaceAll(s, "_", ""), 64)
}

// Problems flattens an error returned by this package into its *Error
// values, in order (nil when err holds none).
func Problems(err error) []*Error {
	var out []*Error
	var walk func(error)
	walk = func(err error) {
		switch e := err.(type) {
		case nil:
		case *Error:
			out = append(out, e)
		case interface{ Unwrap() []error }:
			for _, x := range e.Unwrap() {
				walk(x)
			}
		case interface{ Unwrap() error }:
			walk(e.Unwrap())
		}
	}
	walk(err)
	return out
}
