package serving

import (
	"context"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"sync"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"freshet.dev/freshet/internal/testserver"
	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/serving/reader"
	"freshet.dev/freshet/stream"
)

// sharedRedis returns the address in FRESHET_TEST_REDIS (see deploy/redis.sh).
// The test is skipped when it is unset and fails when the server is unreachable.
func sharedRedis(t testing.TB) string { return testserver.Redis(t) }

// testPrefix returns a prefix unique to the test and removes its keys after.
func testPrefix(t testing.TB, addr string) string {
	p := fmt.Sprintf("t%d-%s", time.Now().UnixNano()%1e9, sanitize(t.Name()))
	t.Cleanup(func() {
		c := redis.NewClient(&redis.Options{Addr: addr})
		defer c.Close()
		ctx := context.Background()
		iter := c.Scan(ctx, 0, p+"/*", 1000).Iterator()
		for iter.Next(ctx) {
			c.Unlink(ctx, iter.Val())
		}
	})
	return p
}

func sanitize(s string) string {
	b := []byte(s)
	for i, c := range b {
		if c == '/' || c == '{' || c == '}' || c == ' ' {
			b[i] = '_'
		}
	}
	return string(b)
}

// server is a test-owned redis-server process (not daemonized: the test holds
// its PID and stops it).
type server struct {
	t    testing.TB
	port int
	args []string
	cmd  *exec.Cmd
	dir  string
}

func freePort(t testing.TB) int {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port
}

// startServer starts redis-server with persistence off and extra arguments.
// When tlsPing is set, readiness is checked through that client instead.
func startServer(t testing.TB, port int, extra []string, ready func() error) *server {
	t.Helper()
	sharedRedis(t) // same skip/fail rule: these tests run where CI runs Redis
	bin, err := exec.LookPath("redis-server")
	if err != nil {
		t.Fatalf("redis-server not installed (deploy/redis.sh start installs it): %v", err)
	}
	s := &server{t: t, port: port, dir: t.TempDir()}
	s.args = append([]string{"--bind", "127.0.0.1", "--save", "", "--appendonly", "no",
		"--dir", s.dir, "--protected-mode", "no"}, extra...)
	if !contains(extra, "--port") {
		s.args = append(s.args, "--port", strconv.Itoa(port))
	}
	s.start(bin, ready)
	t.Cleanup(s.kill)
	return s
}

func contains(xs []string, x string) bool {
	for _, y := range xs {
		if y == x {
			return true
		}
	}
	return false
}

func (s *server) start(bin string, ready func() error) {
	s.t.Helper()
	s.cmd = exec.Command(bin, s.args...)
	s.cmd.Stdout, _ = os.Create(filepath.Join(s.dir, "out.log"))
	s.cmd.Stderr = s.cmd.Stdout
	if err := s.cmd.Start(); err != nil {
		s.t.Fatalf("start redis-server: %v", err)
	}
	if ready == nil {
		ready = func() error {
			c := redis.NewClient(&redis.Options{Addr: s.addr(), DialTimeout: time.Second})
			defer c.Close()
			return c.Ping(context.Background()).Err()
		}
	}
	var err error
	for range 100 {
		if err = ready(); err == nil {
			return
		}
		time.Sleep(50 * time.Millisecond)
	}
	log, _ := os.ReadFile(filepath.Join(s.dir, "out.log"))
	s.t.Fatalf("redis-server on %d not ready: %v\n%s", s.port, err, log)
}

func (s *server) addr() string { return "127.0.0.1:" + strconv.Itoa(s.port) }

// kill stops the process by its PID and waits for it.
func (s *server) kill() {
	if s.cmd == nil || s.cmd.Process == nil {
		return
	}
	_ = s.cmd.Process.Kill()
	_, _ = s.cmd.Process.Wait()
	s.cmd = nil
}

// restart starts the server again, empty (persistence is off).
func (s *server) restart(ready func() error) {
	bin, _ := exec.LookPath("redis-server")
	s.start(bin, ready)
}

// fakeModel stands in for the trainer: tables of users and items whose rows
// change under a seeded generator, handed to a Publisher at batch boundaries.
type fakeModel struct {
	mu    sync.Mutex
	k     int
	mode  online.Mode
	ids   [2][]string
	vecs  [2][][]float32
	bias  [2][]float32
	count [2][]uint32
	last  [2][]int64
	gone  [2]map[int32]bool
	rng   *rand.Rand
	t     int64
	meta  online.Meta
}

func newFakeModel(users, items, k int, mode online.Mode, seed uint64) *fakeModel {
	m := &fakeModel{k: k, mode: mode, rng: rand.New(rand.NewPCG(seed, 0x5eed))}
	n := [2]int{users, items}
	for s := range 2 {
		m.gone[s] = map[int32]bool{}
		for r := range n[s] {
			pre := "listener-"
			if s == 1 {
				pre = "show-"
			}
			m.ids[s] = append(m.ids[s], pre+strconv.Itoa(r))
			v := make([]float32, k)
			for j := range v {
				v[j] = float32(m.rng.NormFloat64() * 0.1)
			}
			m.vecs[s] = append(m.vecs[s], v)
			m.bias[s] = append(m.bias[s], float32(m.rng.NormFloat64()*0.05))
			m.count[s] = append(m.count[s], 0)
			m.last[s] = append(m.last[s], 0)
		}
	}
	m.meta = online.Meta{Format: online.MetaFormat, Rank: k, Mode: mode.String(),
		Position: stream.Position{Source: "scenario", Seed: seed},
		Model:    online.ModelMeta{MeanSum: 3.5, MeanN: 1, Next: [2]int32{int32(users), int32(items)}},
		Monitor:  []byte(`{"rmse":0.9}`)}
	return m
}

func (m *fakeModel) record(s int, r int32) online.RowRecord {
	return online.RowRecord{Side: online.Side(s), Row: r, ID: []byte(m.ids[s][r]), Bias: m.bias[s][r],
		Count: m.count[s][r], Last: m.last[s][r], Vec: m.vecs[s][r]}
}

// step changes n random rows (both sides) and returns them with the meta.
func (m *fakeModel) step(n int) (*online.RowSet, *online.Meta) {
	m.mu.Lock()
	defer m.mu.Unlock()
	rs := new(online.RowSet)
	rs.Reset(m.k)
	for range n {
		s := m.rng.IntN(2)
		r := int32(m.rng.IntN(len(m.ids[s])))
		if m.gone[s][r] {
			continue
		}
		m.t += 7
		for j := range m.vecs[s][r] {
			m.vecs[s][r][j] += float32(m.rng.NormFloat64() * 0.01)
		}
		m.bias[s][r] += 0.001
		m.count[s][r]++
		m.last[s][r] = m.t
		rs.Append(m.record(s, r))
		m.meta.Counts.Applied++
	}
	m.meta.Seq++
	m.meta.Time = m.t
	m.meta.Position.Offset = int64(m.meta.Counts.Applied)
	return rs, m.meta.Clone()
}

// erase removes row r of side s and returns the Deleted record set.
func (m *fakeModel) erase(s int, r int32) (*online.RowSet, *online.Meta) {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.gone[s][r] = true
	rs := new(online.RowSet)
	rs.Reset(m.k)
	rs.Append(online.RowRecord{Side: online.Side(s), Row: r, ID: []byte(m.ids[s][r]), Deleted: true})
	m.meta.Counts.Erased++
	m.meta.Seq++
	return rs, m.meta.Clone()
}

// full streams every live row to p in chunks, then EndFull.
func (m *fakeModel) full(p online.Publisher, chunk int) {
	m.mu.Lock()
	defer m.mu.Unlock()
	rs := new(online.RowSet)
	rs.Reset(m.k)
	for s := range 2 {
		for r := range m.ids[s] {
			if m.gone[s][int32(r)] {
				continue
			}
			rs.Append(m.record(s, int32(r)))
			if rs.Len() == chunk {
				p.OfferFull(rs)
				rs = new(online.RowSet)
				rs.Reset(m.k)
			}
		}
	}
	if rs.Len() > 0 {
		p.OfferFull(rs)
	}
	p.EndFull(m.meta.Clone())
}

// readAll reads every vector of the current version straight from Redis.
func readAll(t testing.TB, c redis.UniversalClient, prefix string) (reader.Meta, map[string]online.RowRecord) {
	t.Helper()
	ctx := context.Background()
	r, err := OpenRestore(ctx, Options{Client: c, Prefix: prefix})
	if err != nil {
		t.Fatalf("open restore: %v", err)
	}
	got := map[string]online.RowRecord{}
	err = r.Rows(ctx, func(rec *online.RowRecord) error {
		key := strconv.Itoa(int(rec.Side)) + "|" + string(rec.ID)
		if _, dup := got[key]; dup {
			return fmt.Errorf("duplicate %s", key)
		}
		cp := *rec
		cp.ID = append([]byte(nil), rec.ID...)
		cp.Vec = append([]float32(nil), rec.Vec...)
		got[key] = cp
		return nil
	})
	if err != nil {
		t.Fatalf("rows: %v", err)
	}
	return r.Record, got
}

// compareModel checks that Redis holds exactly the model's live rows, bit for
// bit (float32 bits compared, so -0 and NaN payloads would show).
func compareModel(t testing.TB, m *fakeModel, got map[string]online.RowRecord) {
	t.Helper()
	m.mu.Lock()
	defer m.mu.Unlock()
	want := 0
	bad := 0
	for s := range 2 {
		for r := range m.ids[s] {
			key := strconv.Itoa(s) + "|" + m.ids[s][r]
			g, ok := got[key]
			if m.gone[s][int32(r)] {
				if ok {
					t.Errorf("erased %s still in Redis", key)
				}
				continue
			}
			want++
			if !ok {
				if bad++; bad < 5 {
					t.Errorf("%s missing from Redis", key)
				}
				continue
			}
			if g.Row != int32(r) || g.Count != m.count[s][r] || g.Last != m.last[s][r] {
				if bad++; bad < 5 {
					t.Errorf("%s trailer: row %d count %d last %d, want %d %d %d", key, g.Row, g.Count, g.Last, r, m.count[s][r], m.last[s][r])
				}
			}
			wantBias := m.bias[s][r]
			if m.mode == online.Implicit {
				wantBias = 0
			}
			if math.Float32bits(g.Bias) != math.Float32bits(wantBias) {
				if bad++; bad < 5 {
					t.Errorf("%s bias %v, want %v", key, g.Bias, wantBias)
				}
			}
			for j, x := range g.Vec {
				if math.IsNaN(float64(x)) || math.IsInf(float64(x), 0) {
					t.Fatalf("%s factor %d not finite: %v", key, j, x)
				}
				if math.Float32bits(x) != math.Float32bits(m.vecs[s][r][j]) {
					if bad++; bad < 5 {
						t.Errorf("%s factor %d = %v, want %v", key, j, x, m.vecs[s][r][j])
					}
					break
				}
			}
		}
	}
	if len(got) != want {
		t.Errorf("Redis holds %d vectors, model has %d live rows", len(got), want)
	}
	if bad > 0 {
		t.Fatalf("%d vectors differ", bad)
	}
}

// waitFor polls cond until it holds or the timeout passes.
func waitFor(t testing.TB, timeout time.Duration, what string, cond func() bool) {
	t.Helper()
	end := time.Now().Add(timeout)
	for time.Now().Before(end) {
		if cond() {
			return
		}
		time.Sleep(20 * time.Millisecond)
	}
	t.Fatalf("timed out after %v waiting for %s", timeout, what)
}

// publishFull answers WantFull the way the trainer does.
func publishFull(t testing.TB, w *Writer, m *fakeModel) {
	t.Helper()
	if !w.WantFull() {
		t.Fatal("writer does not want a complete copy")
	}
	m.full(w, 5000)
}

var errStop = errors.New("stop")
