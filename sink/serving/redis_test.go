package serving

import (
	"context"
	"encoding/json"
	"errors"
	"math"
	"reflect"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/serving/reader"
)

func newWriter(t testing.TB, o Options) *Writer {
	t.Helper()
	w, err := New(o)
	if err != nil {
		t.Fatalf("new writer: %v", err)
	}
	t.Cleanup(func() {
		ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
		defer cancel()
		_ = w.Close(ctx)
	})
	return w
}

func flush(t testing.TB, w *Writer) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if err := w.Flush(ctx); err != nil {
		t.Fatalf("flush: %v", err)
	}
}

func client(addr string) redis.UniversalClient {
	return redis.NewClient(&redis.Options{Addr: addr, ContextTimeoutEnabled: true})
}

// TestWrite200k publishes 200,000 vectors (a complete copy, then coalesced
// Offers) and checks every value in Redis against the model bit for bit, and
// the metadata against the last meta.
func TestWrite200k(t *testing.T) {
	addr := sharedRedis(t)
	prefix := testPrefix(t, addr)
	m := newFakeModel(150_000, 50_000, 64, online.Explicit, 1)
	w := newWriter(t, Options{Addrs: []string{addr}, Prefix: prefix, Mode: online.Explicit, Scale: [2]float64{1, 5}})
	publishFull(t, w, m)
	waitFor(t, 60*time.Second, "first version", func() bool { return w.Status().Version != 0 })
	var last *online.Meta
	for range 50 {
		rs, meta := m.step(2000) // rows repeat across batches: coalesced
		w.Offer(rs, meta)
		last = meta
	}
	flush(t, w)
	c := client(addr)
	defer c.Close()
	rec, got := readAll(t, c, prefix)
	compareModel(t, m, got)
	if len(got) != 200_000 {
		t.Fatalf("%d vectors, want 200000", len(got))
	}
	var gm online.Meta
	if err := json.Unmarshal(rec.Model, &gm); err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(gm.Position, last.Position) || gm.Seq != last.Seq || gm.Counts != last.Counts {
		t.Fatalf("metadata position %+v seq %d, want %+v seq %d", gm.Position, gm.Seq, last.Position, last.Seq)
	}
	if rec.Users != 150_000 || rec.Items != 50_000 || rec.Rank != 64 || rec.Mode != "explicit" || rec.Applied != last.Counts.Applied {
		t.Fatalf("metadata record: users %d items %d rank %d mode %s applied %d", rec.Users, rec.Items, rec.Rank, rec.Mode, rec.Applied)
	}
	// μ = MeanSum/MeanN = 3.5 in the fake model.
	if math.Abs(rec.GlobalMean-3.5) > 1e-12 {
		t.Fatalf("global mean %v, want 3.5", rec.GlobalMean)
	}
	st := w.Status()
	if st.Degraded || st.VectorsWritten < 200_000 || st.Pending != 0 {
		t.Fatalf("status %+v", st)
	}
	t.Logf("status: written %d, flushes %d, last flush %v, max %v, fresh p50 %v p99 %v",
		st.VectorsWritten, st.Flushes, st.LastFlushDuration, st.MaxFlushDuration, st.FreshP50, st.FreshP99)
}

// TestVersionSwitchNoMix publishes several complete versions, version v with
// every factor equal to v, while readers poll: each read result must come
// from one version only.
func TestVersionSwitchNoMix(t *testing.T) {
	addr := sharedRedis(t)
	prefix := testPrefix(t, addr)
	const users, items, k = 2000, 500, 8
	m := newFakeModel(users, items, k, online.Implicit, 2)
	w := newWriter(t, Options{Addrs: []string{addr}, Prefix: prefix, Mode: online.Implicit,
		Grace: 150 * time.Millisecond, FlushInterval: 20 * time.Millisecond, RowsPerPipeline: 500, Buckets: 64})
	setAll := func(v float32) {
		m.mu.Lock()
		for s := range 2 {
			for _, vec := range m.vecs[s] {
				for j := range vec {
					vec[j] = v
				}
			}
		}
		m.mu.Unlock()
	}
	setAll(1)
	publishFull(t, w, m)
	waitFor(t, 10*time.Second, "version 1", func() bool { return w.Status().Version == 1 })

	c := client(addr)
	defer c.Close()
	ctx, cancel := context.WithCancel(context.Background())
	var wg sync.WaitGroup
	var reads, mixed atomic.Int64
	seen := sync.Map{}
	var firstErr atomic.Value
	for g := range 2 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			// A long refresh keeps a stale version until it is retired, so
			// the re-resolve path runs too.
			rd, _ := reader.New(c, reader.Options{Prefix: prefix, Refresh: time.Duration(g+1) * time.Hour})
			us := make([]string, 50)
			is := make([]string, 50)
			for i := range us {
				us[i] = m.ids[0][(i*37+g)%users]
				is[i] = m.ids[1][(i*11+g)%items]
			}
			for ctx.Err() == nil {
				res, err := rd.Fetch(ctx, us, is)
				if err != nil {
					if ctx.Err() == nil {
						firstErr.CompareAndSwap(nil, err)
					}
					return
				}
				reads.Add(1)
				want := float32(res.Meta.Version)
				seen.Store(res.Meta.Version, true)
				for _, vs := range [][]reader.Vector{res.Users, res.Items} {
					for _, v := range vs {
						if !v.Found() {
							mixed.Add(1)
							continue
						}
						for _, x := range v.Factors {
							if x != want {
								mixed.Add(1)
							}
						}
					}
				}
			}
		}()
	}
	for v := 2; v <= 6; v++ {
		setAll(float32(v))
		w.RequestFull()
		publishFull(t, w, m)
		waitFor(t, 10*time.Second, "next version", func() bool { return w.Status().Version == uint64(v) })
		time.Sleep(250 * time.Millisecond) // past the grace period: the old one is retired
	}
	cancel()
	wg.Wait()
	if e := firstErr.Load(); e != nil {
		t.Fatalf("reader error: %v", e)
	}
	n := 0
	seen.Range(func(_, _ any) bool { n++; return true })
	t.Logf("%d reads over %d versions", reads.Load(), n)
	if mixed.Load() != 0 {
		t.Fatalf("%d vectors from another version (or missing) in %d reads", mixed.Load(), reads.Load())
	}
	if n < 3 || reads.Load() < 20 {
		t.Fatalf("too little coverage: %d reads, %d versions", reads.Load(), n)
	}
	// Old versions are gone.
	for v := 1; v <= 4; v++ {
		l, _ := reader.NewLayout(prefix)
		if c.Exists(context.Background(), l.Meta(uint64(v))).Val() != 0 {
			t.Errorf("version %d not retired", v)
		}
	}
}

// TestOutage stops a test-owned Redis for ~20 s mid-stream and restarts it
// empty: the writer stays up, reports degraded, detects the loss, and after
// the fake trainer answers WantFull, Redis equals the model exactly.
func TestOutage(t *testing.T) {
	srv := startServer(t, freePort(t), nil, nil)
	prefix := "outage"
	m := newFakeModel(20_000, 5_000, 16, online.Explicit, 3)
	var changes atomic.Int64
	w := newWriter(t, Options{Addrs: []string{srv.addr()}, Prefix: prefix, Mode: online.Explicit,
		FlushInterval: 100 * time.Millisecond, MaxBackoff: 500 * time.Millisecond, WriteTimeout: time.Second,
		OnChange: func(Status) { changes.Add(1) }})

	// The fake trainer: a batch every 5 ms; a complete copy whenever asked.
	stop := make(chan struct{})
	done := make(chan struct{})
	var fulls atomic.Int64
	go func() {
		defer close(done)
		for {
			select {
			case <-stop:
				return
			case <-time.After(5 * time.Millisecond):
			}
			if w.WantFull() {
				fulls.Add(1)
				m.full(w, 2000)
			}
			rs, meta := m.step(200)
			w.Offer(rs, meta)
		}
	}()
	waitFor(t, 10*time.Second, "first version", func() bool { return w.Status().Version != 0 })
	time.Sleep(500 * time.Millisecond)
	v1 := w.Status().Version

	srv.kill()
	waitFor(t, 10*time.Second, "degraded", func() bool { return w.Status().Degraded })
	time.Sleep(20 * time.Second)
	st := w.Status()
	if !st.Degraded || st.Pending == 0 || st.LastError == "" {
		t.Fatalf("during the outage: %+v", st)
	}
	t.Logf("during outage: pending %d, last error %q", st.Pending, st.LastError)
	srv.restart(nil)
	waitFor(t, 30*time.Second, "republished version", func() bool {
		s := w.Status()
		return s.DataLosses >= 1 && s.Version > v1 && !s.Degraded
	})
	time.Sleep(300 * time.Millisecond)
	close(stop)
	<-done
	flush(t, w)
	c := client(srv.addr())
	defer c.Close()
	_, got := readAll(t, c, prefix)
	compareModel(t, m, got)
	st = w.Status()
	t.Logf("after: %+v, complete copies %d, OnChange calls %d", st, fulls.Load(), changes.Load())
	if fulls.Load() < 2 || changes.Load() < 3 {
		t.Fatalf("complete copies %d (want >= 2), OnChange calls %d (want >= 3)", fulls.Load(), changes.Load())
	}
}

// TestRestore writes a model, then restores it: the same rows and meta come
// back, and a writer adopting the version needs no complete copy.
func TestRestore(t *testing.T) {
	addr := sharedRedis(t)
	prefix := testPrefix(t, addr)
	m := newFakeModel(3000, 700, 12, online.Implicit, 4)
	w, err := New(Options{Addrs: []string{addr}, Prefix: prefix, Mode: online.Implicit})
	if err != nil {
		t.Fatal(err)
	}
	publishFull(t, w, m)
	var last *online.Meta
	for range 20 {
		rs, meta := m.step(300)
		w.Offer(rs, meta)
		last = meta
	}
	ctx := context.Background()
	cctx, cancel := context.WithTimeout(ctx, 20*time.Second)
	defer cancel()
	if err := w.Close(cctx); err != nil {
		t.Fatalf("close: %v", err)
	}

	r, err := OpenRestore(ctx, Options{Addrs: []string{addr}, Prefix: prefix})
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	// Meta round-trips exactly (compared through JSON, which is its form).
	a, _ := json.Marshal(r.Meta)
	b, _ := json.Marshal(last)
	if string(a) != string(b) {
		t.Fatalf("restored meta\n%s\nwant\n%s", a, b)
	}
	c := client(addr)
	defer c.Close()
	_, got := readAll(t, c, prefix)
	compareModel(t, m, got)

	w2 := newWriter(t, Options{Addrs: []string{addr}, Prefix: prefix, Mode: online.Implicit, Adopt: r.Version})
	rs, meta := m.step(100)
	w2.Offer(rs, meta)
	flush(t, w2)
	if w2.WantFull() || w2.Status().Version != r.Version {
		t.Fatalf("adopting writer: want full %v, version %d (adopted %d)", w2.WantFull(), w2.Status().Version, r.Version)
	}
	_, got = readAll(t, c, prefix)
	compareModel(t, m, got)

	if _, err := OpenRestore(ctx, Options{Addrs: []string{addr}, Prefix: prefix + "-none"}); !errors.Is(err, reader.ErrNoVersion) {
		t.Fatalf("restore of an empty prefix: %v, want ErrNoVersion", err)
	}
}

// TestErasure erases a user and an item while an old version is in its grace
// period: both are gone from every live version.
func TestErasure(t *testing.T) {
	addr := sharedRedis(t)
	prefix := testPrefix(t, addr)
	m := newFakeModel(500, 100, 4, online.Explicit, 5)
	w := newWriter(t, Options{Addrs: []string{addr}, Prefix: prefix, Mode: online.Explicit,
		Grace: time.Minute, FlushInterval: 20 * time.Millisecond, Buckets: 16})
	publishFull(t, w, m)
	waitFor(t, 10*time.Second, "v1", func() bool { return w.Status().Version == 1 })
	w.RequestFull()
	publishFull(t, w, m)
	waitFor(t, 10*time.Second, "v2", func() bool { return w.Status().Version == 2 })

	c := client(addr)
	defer c.Close()
	l, _ := reader.NewLayout(prefix)
	ctx := context.Background()
	user, item := m.ids[0][42], m.ids[1][7]
	present := func(v uint64, side, id string) bool {
		return c.HExists(ctx, l.Bucket(v, side, reader.BucketOf(id, 16)), id).Val()
	}
	for v := uint64(1); v <= 2; v++ {
		if !present(v, reader.SideUser, user) || !present(v, reader.SideItem, item) {
			t.Fatalf("before erasure: ids missing from version %d", v)
		}
	}
	// An update queued just before the erasure must not resurrect the row.
	rs, meta := m.step(0)
	rs.Append(m.record(0, 42))
	w.Offer(rs, meta)
	rs, meta = m.erase(0, 42)
	w.Offer(rs, meta)
	rs, meta = m.erase(1, 7)
	w.Offer(rs, meta)
	flush(t, w)
	for v := uint64(1); v <= 2; v++ {
		if present(v, reader.SideUser, user) || present(v, reader.SideItem, item) {
			t.Fatalf("after erasure: ids still in version %d", v)
		}
	}
	rd, _ := reader.New(c, reader.Options{Prefix: prefix})
	res, err := rd.Fetch(ctx, []string{user}, []string{item, m.ids[1][8]})
	if err != nil {
		t.Fatal(err)
	}
	if res.Users[0].Found() || res.Items[0].Found() || !res.Items[1].Found() {
		t.Fatalf("reader after erasure: user %v item %v other %v", res.Users[0].Found(), res.Items[0].Found(), res.Items[1].Found())
	}
	_, got := readAll(t, c, prefix)
	compareModel(t, m, got)
	var rec reader.Meta
	raw, _ := c.Get(ctx, l.Meta(2)).Bytes()
	_ = json.Unmarshal(raw, &rec)
	if rec.Users != 499 || rec.Items != 99 {
		t.Fatalf("counts after erasure: users %d items %d, want 499 99", rec.Users, rec.Items)
	}
}

// TestBadCredentials: a wrong password gives a clear error in Status and from
// Restore.
func TestACL(t *testing.T) {
	addr := sharedRedis(t)
	prefix := testPrefix(t, addr)
	c := client(addr)
	defer c.Close()
	ctx := context.Background()
	user := "freshet-" + prefix
	if err := c.Do(ctx, "ACL", "SETUSER", user, "reset", "on", ">s3cret-pass", "~"+prefix+"/*", "+@all").Err(); err != nil {
		t.Fatalf("acl setuser: %v", err)
	}
	defer c.Do(ctx, "ACL", "DELUSER", user)

	m := newFakeModel(100, 20, 4, online.Implicit, 6)
	w := newWriter(t, Options{Addrs: []string{addr}, Username: user, Password: "s3cret-pass", Prefix: prefix, Mode: online.Implicit})
	publishFull(t, w, m)
	waitFor(t, 10*time.Second, "published with ACL user", func() bool { return w.Status().Version != 0 })
	_, got := readAll(t, c, prefix)
	compareModel(t, m, got)

	bad := newWriter(t, Options{Addrs: []string{addr}, Username: user, Password: "wrong", Prefix: prefix + "x", Mode: online.Implicit})
	waitFor(t, 10*time.Second, "degraded with a wrong password", func() bool { return bad.Status().Degraded })
	if e := bad.Status().LastError; !strings.Contains(e, "WRONGPASS") {
		t.Fatalf("error %q does not say the credentials are wrong", e)
	}
	if strings.Contains(bad.Status().LastError, "wrong") && strings.Contains(bad.Status().LastError, "pass wrong") {
		t.Fatal("password leaked into the error")
	}
	_, err := OpenRestore(ctx, Options{Addrs: []string{addr}, Username: user, Password: "wrong", Prefix: prefix})
	if err == nil || !strings.Contains(err.Error(), "WRONGPASS") {
		t.Fatalf("restore with a wrong password: %v", err)
	}
	// The ACL user is confined to its prefix: another namespace is refused.
	ou := newWriter(t, Options{Addrs: []string{addr}, Username: user, Password: "s3cret-pass", Prefix: "elsewhere", Mode: online.Implicit})
	waitFor(t, 10*time.Second, "refused outside the prefix", func() bool { return ou.Status().Degraded })
	if e := ou.Status().LastError; !strings.Contains(e, "NOPERM") {
		t.Fatalf("error %q does not say permission denied", e)
	}
}

// TestLossDuringFullCopy empties Redis while a complete copy is being
// written (as a failover to an empty replica would): the copy is dropped at
// EndFull, WantFull turns true, and the next copy publishes a complete
// version. A marker overwritten by someone else counts as a loss too.
func TestLossDuringFullCopy(t *testing.T) {
	srv := startServer(t, freePort(t), nil, nil)
	m := newFakeModel(4000, 1000, 8, online.Implicit, 12)
	w := newWriter(t, Options{Addrs: []string{srv.addr()}, Prefix: "loss", Mode: online.Implicit,
		FlushInterval: 10 * time.Millisecond, RowsPerPipeline: 500})
	c := client(srv.addr())
	defer c.Close()
	ctx := context.Background()
	if !w.WantFull() {
		t.Fatal("want full at start")
	}
	// First half of a copy, flushed.
	rs := new(online.RowSet)
	rs.Reset(8)
	for r := range int32(2000) {
		rs.Append(m.record(0, r))
	}
	w.OfferFull(rs)
	waitFor(t, 10*time.Second, "chunks written", func() bool { return w.Status().VectorsWritten >= 2000 })
	if err := c.FlushAll(ctx).Err(); err != nil {
		t.Fatal(err)
	}
	rs = new(online.RowSet)
	rs.Reset(8)
	for r := range int32(2000) {
		rs.Append(m.record(0, 2000+r))
	}
	w.OfferFull(rs)
	waitFor(t, 10*time.Second, "loss detected", func() bool { return w.Status().DataLosses == 1 })
	if w.WantFull() {
		t.Fatal("WantFull true in the middle of a copy")
	}
	w.EndFull(m.meta.Clone())
	if !w.WantFull() {
		t.Fatal("an interrupted copy must end in WantFull")
	}
	if c.Exists(ctx, "loss/current").Val() != 0 {
		t.Fatal("the interrupted copy was published")
	}
	publishFull(t, w, m)
	waitFor(t, 10*time.Second, "published", func() bool { return w.Status().Version != 0 })
	_, got := readAll(t, c, "loss")
	compareModel(t, m, got)

	// Someone else's marker: also a loss.
	v := w.Status().Version
	c.Set(ctx, "loss/epoch", "not-ours", 0)
	waitFor(t, 10*time.Second, "second loss", func() bool { return w.Status().DataLosses == 2 && w.WantFull() })
	publishFull(t, w, m)
	waitFor(t, 10*time.Second, "republished", func() bool { return w.Status().Version > v })
	_, got = readAll(t, c, "loss")
	compareModel(t, m, got)
}

// TestReaderBadData: a corrupt pointer, metadata or value gives an error that
// names the key, never a panic.
func TestReaderBadData(t *testing.T) {
	addr := sharedRedis(t)
	prefix := testPrefix(t, addr)
	c := client(addr)
	defer c.Close()
	ctx := context.Background()
	rd, _ := reader.New(c, reader.Options{Prefix: prefix})
	if _, err := rd.Resolve(ctx); !errors.Is(err, reader.ErrNoVersion) {
		t.Fatalf("empty: %v", err)
	}
	l, _ := reader.NewLayout(prefix)
	c.Set(ctx, l.Current(), "abc", 0)
	if _, err := rd.Resolve(ctx); err == nil || !strings.Contains(err.Error(), `"abc"`) {
		t.Fatalf("bad pointer: %v", err)
	}
	c.Set(ctx, l.Current(), "3", 0)
	c.Set(ctx, l.Meta(3), "{not json", 0)
	if _, err := rd.Resolve(ctx); err == nil || !strings.Contains(err.Error(), l.Meta(3)) {
		t.Fatalf("bad meta: %v", err)
	}
	good := reader.Meta{Format: 1, Version: 3, Rank: 4, Mode: "implicit", Buckets: 2, Encoding: reader.EncodingFor(4, false)}
	raw, _ := json.Marshal(good)
	c.Set(ctx, l.Meta(3), raw, 0)
	c.HSet(ctx, l.Bucket(3, reader.SideUser, reader.BucketOf("listener-a", 2)), "listener-a", "short")
	if _, err := rd.Fetch(ctx, []string{"listener-a"}, nil); err == nil || !strings.Contains(err.Error(), "listener-a") {
		t.Fatalf("bad value: %v", err)
	}
	bad := good
	bad.Rank = 5 // encoding no longer matches
	raw, _ = json.Marshal(bad)
	c.Set(ctx, l.Meta(3), raw, 0)
	if _, err := rd.Resolve(ctx); err == nil || !strings.Contains(err.Error(), "encoding") {
		t.Fatalf("inconsistent meta: %v", err)
	}
}
