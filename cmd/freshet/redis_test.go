package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"math"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"freshet.dev/freshet/internal/testserver"
	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/serving/reader"
	"freshet.dev/freshet/stream"
)

// The daemon-level Redis tests run against the server in FRESHET_TEST_REDIS
// (deploy/redis.sh start; export $(deploy/redis.sh env)). They skip when it
// is unset and fail when it is set but unreachable. Each test writes under its
// own key prefix and removes its keys afterwards.

func testRedis(t *testing.T) string { return testserver.Redis(t) }

// redisPrefix returns a key prefix unique to the test and unlinks its keys at
// the end.
func redisPrefix(t *testing.T, addr string) string {
	t.Helper()
	p := fmt.Sprintf("d%d-%s", time.Now().UnixNano()%1e9, strings.NewReplacer("/", "_", " ", "_").Replace(t.Name()))
	t.Cleanup(func() {
		c := redis.NewClient(&redis.Options{Addr: addr})
		defer c.Close()
		ctx := context.Background()
		for _, k := range scanKeys(t, c, p) {
			c.Unlink(ctx, k)
		}
	})
	return p
}

func scanKeys(t *testing.T, c *redis.Client, prefix string) []string {
	t.Helper()
	ctx := context.Background()
	var keys []string
	it := c.Scan(ctx, 0, prefix+"/*", 1000).Iterator()
	for it.Next(ctx) {
		keys = append(keys, it.Val())
	}
	if err := it.Err(); err != nil {
		t.Fatalf("scan %s/*: %v", prefix, err)
	}
	return keys
}

// withRedis returns a copy of env with the serving copy switched on.
func withRedis(env map[string]string, addr, prefix string) map[string]string {
	out := make(map[string]string, len(env)+4)
	for k, v := range env {
		out[k] = v
	}
	out["FRESHET_REDIS_ENABLED"] = "true"
	out["FRESHET_REDIS_ADDRS"] = addr
	out["FRESHET_REDIS_PREFIX"] = prefix
	out["FRESHET_REDIS_FLUSH_INTERVAL"] = "200ms"
	out["FRESHET_REDIS_GRACE"] = "2s"
	return out
}

// served is the current version read back from Redis.
type served struct {
	meta *reader.Meta
	vecs [2]map[string]reader.Vector // by side, by ID
}

// readServed reads every vector of the current version: HGETALL over each
// bucket of both sides, decoded with the metadata's encoding.
func readServed(t *testing.T, addr, prefix string) served {
	t.Helper()
	c := redis.NewClient(&redis.Options{Addr: addr})
	defer c.Close()
	r, err := reader.New(c, reader.Options{Prefix: prefix})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	m, err := r.Resolve(ctx)
	if err != nil {
		t.Fatalf("resolve the current version: %v", err)
	}
	s := served{meta: m}
	for side, name := range []string{reader.SideUser, reader.SideItem} {
		s.vecs[side] = map[string]reader.Vector{}
		for b := 0; b < m.Buckets; b++ {
			h, err := c.HGetAll(ctx, r.Layout().Bucket(m.Version, name, b)).Result()
			if err != nil {
				t.Fatalf("hgetall bucket %d: %v", b, err)
			}
			for id, v := range h {
				vec := make([]float32, m.Rank)
				bias, tr, err := m.Encoding.Decode(v, vec)
				if err != nil {
					t.Fatalf("version %d %s %q: %v", m.Version, name, id, err)
				}
				if got := reader.BucketOf(id, m.Buckets); got != b {
					t.Fatalf("%s %q is in bucket %d, its hash says %d", name, id, b, got)
				}
				s.vecs[side][id] = reader.Vector{ID: id, Factors: vec, Bias: bias, Trailer: tr}
			}
		}
	}
	return s
}

// sameAsModel requires the served version to hold exactly the live rows of
// the recovered model, bit for bit (factors, bias, row bookkeeping), every
// value finite, and its metadata to name the checkpoint's position and count.
func sameAsModel(t *testing.T, s served, d durable) {
	t.Helper()
	for side := online.Users; side <= online.Items; side++ {
		live := 0
		for i := range d.rows[side].Recs {
			rec := &d.rows[side].Recs[i]
			if rec.Deleted || rec.Vec == nil {
				continue
			}
			live++
			v, ok := s.vecs[side][string(rec.ID)]
			if !ok {
				t.Fatalf("%s %q (row %d) is in the model but not in Redis version %d", side, rec.ID, rec.Row, s.meta.Version)
			}
			if s.meta.HasBias() && math.Float32bits(v.Bias) != math.Float32bits(rec.Bias) {
				t.Fatalf("%s %q bias: redis %v, model %v", side, rec.ID, v.Bias, rec.Bias)
			}
			if !finite(v.Bias) {
				t.Fatalf("%s %q bias %v is not finite", side, rec.ID, v.Bias)
			}
			for j := range rec.Vec {
				if math.Float32bits(v.Factors[j]) != math.Float32bits(rec.Vec[j]) {
					t.Fatalf("%s %q factor %d: redis %v, model %v", side, rec.ID, j, v.Factors[j], rec.Vec[j])
				}
				if !finite(v.Factors[j]) {
					t.Fatalf("%s %q factor %d = %v is not finite", side, rec.ID, j, v.Factors[j])
				}
			}
			if v.Trailer.Row != rec.Row || v.Trailer.Count != rec.Count || v.Trailer.Last != rec.Last || v.Trailer.Epoch != rec.Epoch {
				t.Fatalf("%s %q trailer: redis %+v, model row %d count %d last %d epoch %d",
					side, rec.ID, v.Trailer, rec.Row, rec.Count, rec.Last, rec.Epoch)
			}
		}
		if got := len(s.vecs[side]); got != live {
			t.Fatalf("%s side: %d vectors in Redis version %d, %d live rows in the model", side, got, s.meta.Version, live)
		}
	}
	var pos stream.Position
	if err := json.Unmarshal(s.meta.Position, &pos); err != nil {
		t.Fatalf("metadata position %s: %v", s.meta.Position, err)
	}
	if !reflect.DeepEqual(pos, d.meta.Position) {
		t.Fatalf("metadata position %+v, checkpoint %+v", pos, d.meta.Position)
	}
	if s.meta.Applied != d.meta.Counts.Applied {
		t.Fatalf("metadata events_applied %d, checkpoint %d", s.meta.Applied, d.meta.Counts.Applied)
	}
	if s.meta.HasBias() && s.meta.GlobalMean != d.model.Mean() {
		t.Fatalf("metadata global mean %v, model %v", s.meta.GlobalMean, d.model.Mean())
	}
}

func finite(x float32) bool { return !math.IsNaN(float64(x)) && !math.IsInf(float64(x), 0) }

// sameModels requires two recovered models to be equal row for row.
func sameModels(t *testing.T, got, want durable) {
	t.Helper()
	for s := online.Users; s <= online.Items; s++ {
		compareRows(t, s, got.rows[s], want.rows[s])
	}
	if got.model.Mean() != want.model.Mean() {
		t.Fatalf("global mean %v, want %v", got.model.Mean(), want.model.Mean())
	}
}

// TestRedisFinalFlush streams 200,000 scenario events unpaced. After the
// final flush (exit 0) the current version holds every vector of the model
// recovered from the data directory, bit for bit, and its metadata names the
// checkpoint's position.
func TestRedisFinalFlush(t *testing.T) {
	addr := testRedis(t)
	prefix := redisPrefix(t, addr)
	const n = 200000
	env := withRedis(demoEnv(n, 0), addr, prefix)
	dir := t.TempDir()
	t0 := time.Now()
	p, _, stopped := runToEnd(t, dir, env)
	if got := stopped.uint(t, "events"); got != n {
		t.Fatalf("stopped at %d events, want %d", got, n)
	}
	if _, _, ok := p.waitLine(0, 0, func(l logLine) bool { return l.msg() == "serving: version published" }); !ok {
		t.Fatalf("no version published; log:\n%s", p.dump())
	}
	d := recoverDir(t, dir, env)
	s := readServed(t, addr, prefix)
	sameAsModel(t, s, d)
	t.Logf("%d events in %s; version %d holds %d users, %d items", n, time.Since(t0).Round(time.Millisecond),
		s.meta.Version, len(s.vecs[online.Users]), len(s.vecs[online.Items]))

	// The show subcommand reads the same version through the reader.
	var user string
	for id := range s.vecs[online.Users] {
		user = id
		break
	}
	out := runCLI(t, env, "show", "-user", user, "-n", "5")
	if !strings.Contains(out, fmt.Sprintf("version %d ", s.meta.Version)) || !strings.Contains(out, "top 5 of 100 candidates") {
		t.Fatalf("show output:\n%s", out)
	}
	t.Logf("show:\n%s", out)

	// An explicit candidate list, with one item the version does not hold.
	out = runCLI(t, env, "show", "-user", user, "-n", "0", "-candidates", "show-0001,no-such-show,show-0002")
	if !strings.Contains(out, "top 2 of 3 candidates") || !strings.Contains(out, `not in the version: 1 candidates ("no-such-show")`) {
		t.Fatalf("show with candidates:\n%s", out)
	}
	// Mistakes: a clear message and the usage exit code (2); a user the
	// version does not hold is a runtime failure (1).
	for _, c := range []struct {
		args []string
		code int
		want string
	}{
		{[]string{"show"}, 2, "-user is required"},
		{[]string{"show", "-user", user, "-n", "-1"}, 2, "-n -1"},
		{[]string{"show", "-user", "nobody-here"}, 1, "user not found"},
		{[]string{"erase"}, 2, "exactly one of -user and -item"},
		{[]string{"erase", "-user", "a", "-item", "b"}, 2, "exactly one of -user and -item"},
		{[]string{"erase", "-user", "a"}, 2, "kafka.brokers and kafka.topic must be set"},
		{[]string{"erase", "-user", "a", "-file", filepath.Join(t.TempDir(), "missing.jsonl")}, 2, "-file"},
	} {
		code, stderr := runCLIFail(t, env, c.args...)
		if code != c.code || !strings.Contains(stderr, c.want) {
			t.Errorf("freshet %s: exit %d, stderr %q; want exit %d and %q", strings.Join(c.args, " "), code, stderr, c.code, c.want)
		}
	}
}

// runCLIFail runs the test binary as freshet with args, expecting a failure,
// and returns the exit code and stderr.
func runCLIFail(t *testing.T, env map[string]string, args ...string) (int, string) {
	t.Helper()
	cmd := exec.Command(os.Args[0], args...)
	cmd.Env = baseEnv(env)
	var errb bytes.Buffer
	cmd.Stderr = &errb
	if err := cmd.Run(); err == nil {
		t.Fatalf("freshet %s succeeded, want a failure", strings.Join(args, " "))
	}
	return cmd.ProcessState.ExitCode(), errb.String()
}

// runCLI runs the test binary as freshet with args and returns its stdout.
func runCLI(t *testing.T, env map[string]string, args ...string) string {
	t.Helper()
	cmd := exec.Command(os.Args[0], args...)
	cmd.Env = baseEnv(env)
	var out, errb bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &errb
	if err := cmd.Run(); err != nil {
		t.Fatalf("freshet %s: %v\nstdout:\n%s\nstderr:\n%s", strings.Join(args, " "), err, out.String(), errb.String())
	}
	return out.String()
}

// ownRedis is a redis-server process this test starts and stops by its PID
// (persistence off, so a restart comes back empty, like a failover to an
// empty replica).
type ownRedis struct {
	t    *testing.T
	port int
	dir  string
	cmd  *exec.Cmd
}

func startOwnRedis(t *testing.T, port int) *ownRedis {
	t.Helper()
	if port == 0 {
		l, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		port = l.Addr().(*net.TCPAddr).Port
		l.Close()
	}
	r := &ownRedis{t: t, port: port, dir: t.TempDir()}
	r.start()
	t.Cleanup(r.stop)
	return r
}

func (r *ownRedis) addr() string { return "127.0.0.1:" + strconv.Itoa(r.port) }

func (r *ownRedis) start() {
	r.t.Helper()
	bin, err := exec.LookPath("redis-server")
	if err != nil {
		r.t.Fatalf("redis-server not installed (bash deploy/redis.sh start installs it): %v", err)
	}
	r.cmd = exec.Command(bin, "--bind", "127.0.0.1", "--port", strconv.Itoa(r.port), "--save", "",
		"--appendonly", "no", "--dir", r.dir, "--protected-mode", "no")
	logf, err := os.Create(filepath.Join(r.dir, "out.log"))
	if err != nil {
		r.t.Fatal(err)
	}
	r.cmd.Stdout, r.cmd.Stderr = logf, logf
	if err := r.cmd.Start(); err != nil {
		r.t.Fatalf("start redis-server: %v", err)
	}
	c := redis.NewClient(&redis.Options{Addr: r.addr(), DialTimeout: time.Second})
	defer c.Close()
	for range 100 {
		if err = c.Ping(context.Background()).Err(); err == nil {
			return
		}
		time.Sleep(50 * time.Millisecond)
	}
	out, _ := os.ReadFile(filepath.Join(r.dir, "out.log"))
	r.t.Fatalf("redis-server on %d not ready: %v\n%s", r.port, err, out)
}

func (r *ownRedis) stop() {
	if r.cmd == nil || r.cmd.Process == nil {
		return
	}
	_ = r.cmd.Process.Kill()
	_, _ = r.cmd.Process.Wait()
	r.cmd = nil
}

// TestRedisOutage stops a test-owned Redis for about 22 s while the daemon
// streams a paced scenario, and restarts it empty. The daemon stays up and
// reports itself degraded on its progress line, finds on reconnect that
// Redis lost its data (the epoch marker is gone), and republishes a complete
// version. After the end, Redis equals the model bit for bit, and the model
// equals a run of the same events without Redis at all: the serving copy
// never feeds back into training.
func TestRedisOutage(t *testing.T) {
	testRedis(t)
	srv := startOwnRedis(t, 0)
	const n, rate = 160000, 4000 // 40 s of stream
	base := demoEnv(n, rate)
	env := withRedis(base, srv.addr(), "outage")
	env["FRESHET_REDIS_WRITE_TIMEOUT"] = "1s"

	// The reference runs at the same time with the same pacing (the
	// scenario's event times follow its rate), without Redis.
	refDir := t.TempDir()
	ref := start(t, base, "run", "-data", refDir)
	dir := t.TempDir()
	p := start(t, env, "run", "-data", dir)
	_, i := p.mustLine(0, procTimeout, "version published", msgIs("serving: version published"))
	_, i = p.mustLine(i, procTimeout, "progress", func(l logLine) bool { return l.msg() == "progress" && l.uint(t, "events") > 0 })
	time.Sleep(2 * time.Second)
	srv.stop()
	down := time.Now()
	deg, j := p.mustLine(i, procTimeout, "degraded progress", func(l logLine) bool {
		v, _ := l.Fields["redis_degraded"].(bool)
		return l.msg() == "progress" && v
	})
	time.Sleep(22*time.Second - time.Since(down))
	before := deg.uint(t, "events")
	srv.start()
	outage := time.Since(down)
	_, j = p.mustLine(j, procTimeout, "data loss", msgIs("serving: Redis lost its data; republishing a complete version"))
	_, _ = p.mustLine(j, procTimeout, "republished version", msgIs("serving: version published"))
	if code, sig := p.wait(2 * time.Minute); code != 0 || sig {
		t.Fatalf("exit code %d (signaled %v), want 0; log:\n%s", code, sig, p.dump())
	}
	stopped, _ := p.mustLine(0, 0, "stopped", msgIs("stopped"))
	if got := stopped.uint(t, "events"); got != n {
		t.Fatalf("stopped at %d events, want %d", got, n)
	}
	var progressDuring int
	for _, l := range p.snapshot()[i:j] {
		if l.msg() == "progress" {
			progressDuring++
		}
	}
	d := recoverDir(t, dir, env)
	s := readServed(t, srv.addr(), "outage")
	sameAsModel(t, s, d)

	if code, sig := ref.wait(time.Minute); code != 0 || sig {
		t.Fatalf("reference exit code %d (signaled %v), want 0; log:\n%s", code, sig, ref.dump())
	}
	sameModels(t, d, recoverDir(t, refDir, base))
	t.Logf("Redis down %s (first degraded progress line at %d events, %d progress lines while down); final version %d",
		outage.Round(time.Millisecond), before, progressDuring, s.meta.Version)
}

// TestRedisRestore: a daemon with an empty data directory restores from the
// current Redis version ("restored from redis") and resumes at the position
// the version's metadata records.
//
//   - Right after the restore (a run whose scenario ends where the first
//     one did, so it applies nothing), its recovered model equals the old
//     process's recovered model row for row.
//   - A run that restores and continues to 2N equals the old directory
//     resumed from its local checkpoint and continued to 2N without Redis:
//     the version carries the whole cut (rows with their bookkeeping, the
//     global mean, the generators' state), so restoring from Redis is as
//     good as the local checkpoint.
func TestRedisRestore(t *testing.T) {
	addr := testRedis(t)
	prefix := redisPrefix(t, addr)
	const n = 60000
	envN := withRedis(demoEnv(n, 0), addr, prefix)
	oldDir := t.TempDir()
	runToEnd(t, oldDir, envN)
	old := recoverDir(t, oldDir, envN)

	newDir := t.TempDir()
	p, _, stopped := runToEnd(t, newDir, envN)
	rl, _ := p.mustLine(0, 0, "restored", msgIs("restored from redis"))
	if got := rl.uint(t, "events"); got != n {
		t.Fatalf("restored line says %d events, want %d: %s", got, n, rl.Raw)
	}
	if got := stopped.uint(t, "events"); got != n {
		t.Fatalf("restored run stopped at %d events, want %d", got, n)
	}
	restored := recoverDir(t, newDir, envN)
	sameModels(t, restored, old)
	if !reflect.DeepEqual(restored.meta.Position, old.meta.Position) {
		t.Fatalf("restored position %+v, old %+v", restored.meta.Position, old.meta.Position)
	}

	// Restore again into another empty directory and go on to 2N.
	env2 := withRedis(demoEnv(2*n, 0), addr, prefix)
	contDir := t.TempDir()
	p2, _, stopped2 := runToEnd(t, contDir, env2)
	p2.mustLine(0, 0, "restored", msgIs("restored from redis"))
	if got := stopped2.uint(t, "events"); got != 2*n {
		t.Fatalf("continued run stopped at %d events, want %d", got, 2*n)
	}
	cont := recoverDir(t, contDir, env2)
	// The reference resumes the old directory from its local checkpoint
	// with the same 2N configuration (Redis off). It cannot be a fresh run of
	// 2N events: the scenario spreads arrivals over half its length, so the
	// first N events of a 2N scenario are not the N-event scenario.
	runToEnd(t, oldDir, demoEnv(2*n, 0))
	sameModels(t, cont, recoverDir(t, oldDir, demoEnv(2*n, 0)))
	sameAsModel(t, readServed(t, addr, prefix), cont)
}
