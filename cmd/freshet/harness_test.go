package main

import (
	"bufio"
	"bytes"
	"encoding/json"
	"errors"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"freshet.dev/freshet/config"
	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/checkpoint"
)

// childEnv, set to 1, makes the test binary run main() instead of the tests,
// so that the end-to-end tests can start the daemon as a real process (real
// signals, real exit codes) without building it separately. The name is
// outside the FRESHET_ prefix on purpose: it is not a configuration key.
const childEnv = "E2E_FRESHET_MAIN"

func TestMain(m *testing.M) {
	if os.Getenv(childEnv) == "1" {
		main()
		os.Exit(0)
	}
	os.Exit(m.Run())
}

// logLine is one line the daemon wrote to stderr: a JSON log entry (Fields
// set) or anything else (Raw only, e.g. the final "freshet: ..." message).
type logLine struct {
	Raw    string
	Fields map[string]any
}

func (l logLine) msg() string {
	s, _ := l.Fields["msg"].(string)
	return s
}

func (l logLine) str(key string) string {
	s, _ := l.Fields[key].(string)
	return s
}

// uint reads an integer field; the lines are decoded with UseNumber so that
// event counts keep every digit.
func (l logLine) uint(t *testing.T, key string) uint64 {
	t.Helper()
	n, ok := l.Fields[key].(json.Number)
	if !ok {
		t.Fatalf("log line has no number %q: %s", key, l.Raw)
	}
	var v uint64
	if err := json.Unmarshal([]byte(n), &v); err != nil {
		t.Fatalf("field %q of %s: %v", key, l.Raw, err)
	}
	return v
}

func (l logLine) float(t *testing.T, key string) float64 {
	t.Helper()
	n, ok := l.Fields[key].(json.Number)
	if !ok {
		t.Fatalf("log line has no number %q: %s", key, l.Raw)
	}
	v, err := n.Float64()
	if err != nil {
		t.Fatalf("field %q of %s: %v", key, l.Raw, err)
	}
	return v
}

// daemon process under test.
type proc struct {
	t      *testing.T
	cmd    *exec.Cmd
	stdout bytes.Buffer

	mu      sync.Mutex
	lines   []logLine
	changed chan struct{} // closed and replaced on every new line
	eof     bool

	readDone chan struct{}
	exited   chan struct{}
	waitErr  error
}

// baseEnv is the parent's environment without any FRESHET_ override (so a
// developer's shell cannot change the tests), with the child switch on and
// JSON logs.
func baseEnv(extra map[string]string) []string {
	var env []string
	for _, kv := range os.Environ() {
		if strings.HasPrefix(kv, config.EnvPrefix) || strings.HasPrefix(kv, childEnv+"=") {
			continue
		}
		env = append(env, kv)
	}
	env = append(env, childEnv+"=1", "FRESHET_LOG_FORMAT=json", "FRESHET_LOG_LEVEL=info")
	for k, v := range extra {
		env = append(env, k+"="+v)
	}
	return env
}

// start runs the test binary as freshet with args and the environment
// overrides in env.
func start(t *testing.T, env map[string]string, args ...string) *proc {
	t.Helper()
	cmd := exec.Command(os.Args[0], args...)
	cmd.Env = baseEnv(env)
	p := &proc{t: t, cmd: cmd, changed: make(chan struct{}), readDone: make(chan struct{}), exited: make(chan struct{})}
	cmd.Stdout = &p.stdout
	errPipe, err := cmd.StderrPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	go p.read(errPipe)
	go func() {
		<-p.readDone // Wait closes the pipe: read everything first
		p.waitErr = cmd.Wait()
		close(p.exited)
	}()
	t.Cleanup(func() {
		select {
		case <-p.exited:
		default:
			_ = cmd.Process.Kill()
			<-p.exited
		}
	})
	return p
}

func (p *proc) read(r io.Reader) {
	defer close(p.readDone)
	sc := bufio.NewScanner(r)
	sc.Buffer(make([]byte, 64<<10), 4<<20)
	for sc.Scan() {
		ln := logLine{Raw: sc.Text()}
		dec := json.NewDecoder(strings.NewReader(ln.Raw))
		dec.UseNumber()
		var f map[string]any
		if dec.Decode(&f) == nil {
			ln.Fields = f
		}
		p.mu.Lock()
		p.lines = append(p.lines, ln)
		close(p.changed)
		p.changed = make(chan struct{})
		p.mu.Unlock()
	}
	p.mu.Lock()
	p.eof = true
	close(p.changed)
	p.changed = make(chan struct{})
	p.mu.Unlock()
}

// snapshot returns the lines read so far.
func (p *proc) snapshot() []logLine {
	p.mu.Lock()
	defer p.mu.Unlock()
	return append([]logLine(nil), p.lines...)
}

// waitLine waits up to timeout for a line (from index from on) that match
// accepts and returns it with its index. ok is false when the process ended
// or the time ran out first.
func (p *proc) waitLine(from int, timeout time.Duration, match func(logLine) bool) (logLine, int, bool) {
	deadline := time.NewTimer(timeout)
	defer deadline.Stop()
	for {
		p.mu.Lock()
		for i := from; i < len(p.lines); i++ {
			if match(p.lines[i]) {
				ln := p.lines[i]
				p.mu.Unlock()
				return ln, i, true
			}
		}
		from = len(p.lines)
		eof, ch := p.eof, p.changed
		p.mu.Unlock()
		if eof {
			return logLine{}, from, false
		}
		select {
		case <-ch:
		case <-deadline.C:
			return logLine{}, from, false
		}
	}
}

// mustLine is waitLine that fails the test, with the log so far, on a miss.
func (p *proc) mustLine(from int, timeout time.Duration, what string, match func(logLine) bool) (logLine, int) {
	p.t.Helper()
	ln, i, ok := p.waitLine(from, timeout, match)
	if !ok {
		p.t.Fatalf("no %s line within %s; log:\n%s", what, timeout, p.dump())
	}
	return ln, i
}

func msgIs(msg string) func(logLine) bool {
	return func(l logLine) bool { return l.msg() == msg }
}

// wait waits for the process to exit and returns its exit code (-1 when a
// signal killed it) and whether it was killed by a signal.
func (p *proc) wait(timeout time.Duration) (code int, signaled bool) {
	p.t.Helper()
	select {
	case <-p.exited:
	case <-time.After(timeout):
		_ = p.cmd.Process.Kill()
		<-p.exited
		p.t.Fatalf("process did not exit within %s; log:\n%s", timeout, p.dump())
	}
	if p.waitErr != nil {
		var ee *exec.ExitError
		if !errors.As(p.waitErr, &ee) {
			p.t.Fatalf("wait: %v", p.waitErr)
		}
	}
	ws := p.cmd.ProcessState.Sys().(syscall.WaitStatus)
	return p.cmd.ProcessState.ExitCode(), ws.Signaled()
}

func (p *proc) signal(sig os.Signal) {
	p.t.Helper()
	if err := p.cmd.Process.Signal(sig); err != nil {
		p.t.Fatalf("signal %v: %v", sig, err)
	}
}

// dump returns the last lines of the log, for failure messages.
func (p *proc) dump() string {
	lines := p.snapshot()
	if len(lines) > 40 {
		lines = lines[len(lines)-40:]
	}
	var b strings.Builder
	for _, l := range lines {
		b.WriteString(l.Raw)
		b.WriteByte('\n')
	}
	return b.String()
}

// stderrText is the whole stderr as text.
func (p *proc) stderrText() string {
	var b strings.Builder
	for _, l := range p.snapshot() {
		b.WriteString(l.Raw)
		b.WriteByte('\n')
	}
	return b.String()
}

// demoEnv is a small, fast built-in demo: 500 listeners, 100 shows, rank 8,
// short flush and progress periods. events 0 means endless; rate 0 unpaced.
func demoEnv(events, rate int) map[string]string {
	return map[string]string{
		"FRESHET_SOURCE_SCENARIO_LISTENERS": "500",
		"FRESHET_SOURCE_SCENARIO_SHOWS":     "100",
		"FRESHET_SOURCE_SCENARIO_EVENTS":    itoa(events),
		"FRESHET_SOURCE_SCENARIO_RATE":      itoa(rate),
		"FRESHET_SOURCE_SCENARIO_SHIFT_AT":  "0",
		"FRESHET_SOURCE_SCENARIO_SEED":      "3",
		"FRESHET_MODEL_RANK":                "8",
		"FRESHET_MONITOR_PROGRESS_INTERVAL": "100ms",
		"FRESHET_CHECKPOINT_FLUSH_INTERVAL": "50ms",
	}
}

func itoa(n int) string { return strconv.Itoa(n) }

// durable is the state recovered from a data directory the way the daemon
// recovers it.
type durable struct {
	meta  *online.Meta
	info  checkpoint.RecoverInfo
	model *online.Model
	rows  [2]*online.RowSet
}

// recoverDir opens dir with the configuration the daemon ran with (the same
// environment overrides) and loads its newest durable cut.
func recoverDir(t *testing.T, dir string, env map[string]string) durable {
	t.Helper()
	lookup := func(k string) (string, bool) { v, ok := env[k]; return v, ok }
	cfg, err := config.LoadEnv("", lookup)
	if err != nil {
		t.Fatal(err)
	}
	m, mon, err := newModel(cfg)
	if err != nil {
		t.Fatal(err)
	}
	st, err := checkpoint.Open(checkpoint.Options{Dir: dir})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	var d durable
	d.meta, d.info, err = st.Recover(m.ApplyRecord)
	if err != nil {
		t.Fatalf("recover %s: %v", dir, err)
	}
	if d.meta == nil {
		t.Fatalf("%s holds no state", dir)
	}
	if err := m.Restore(d.meta.Model); err != nil {
		t.Fatal(err)
	}
	if err := mon.UnmarshalState(d.meta.Monitor); err != nil {
		t.Fatal(err)
	}
	d.model = m
	for s := online.Users; s <= online.Items; s++ {
		rs := new(online.RowSet)
		m.CopyRows(s, 0, m.Rows(s), rs)
		d.rows[s] = rs
	}
	return d
}

// newestLog returns the path of the highest-numbered log-*.bin in dir.
func newestLog(t *testing.T, dir string) string {
	t.Helper()
	logs, err := filepath.Glob(filepath.Join(dir, "log-*.bin"))
	if err != nil || len(logs) == 0 {
		t.Fatalf("no log in %s (%v)", dir, err)
	}
	newest := logs[0]
	for _, l := range logs[1:] {
		if l > newest { // fixed-width generation numbers sort as text
			newest = l
		}
	}
	return newest
}
