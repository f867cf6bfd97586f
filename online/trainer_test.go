package online_test

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"runtime"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"go.uber.org/zap/zaptest"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/checkpoint"
	"freshet.dev/freshet/stream"
)

// ackCheck wraps a source and fails the test if a position is committed
// before a cut holding it was durable.
type ackCheck struct {
	stream.Source
	t       *testing.T
	mu      sync.Mutex
	durable map[int64]bool // scenario offsets whose cut's Append returned
	commits []int64
}

func (a *ackCheck) Commit(ctx context.Context, p stream.Position) error {
	a.mu.Lock()
	defer a.mu.Unlock()
	if !a.durable[p.Offset] {
		a.t.Errorf("commit of offset %d before its cut was durable", p.Offset)
	}
	if n := len(a.commits); n > 0 && p.Offset < a.commits[n-1] {
		a.t.Errorf("commit went backwards: %d after %d", p.Offset, a.commits[n-1])
	}
	a.commits = append(a.commits, p.Offset)
	return a.Source.Commit(ctx, p)
}

// requireSameRows fails the test unless both models hold the same rows
// with the same IDs, biases, counts, times and factors, bit for bit.
func requireSameRows(t *testing.T, m1, m2 *online.Model) {
	t.Helper()
	for _, side := range []online.Side{online.Users, online.Items} {
		var a, b online.RowSet
		m1.CopyRows(side, 0, m1.Rows(side), &a)
		m2.CopyRows(side, 0, m2.Rows(side), &b)
		if a.Len() != b.Len() {
			t.Fatalf("%v rows: %d and %d", side, a.Len(), b.Len())
		}
		for i := range a.Recs {
			x, y := a.Recs[i], b.Recs[i]
			if x.Row != y.Row || !bytes.Equal(x.ID, y.ID) || math.Float32bits(x.Bias) != math.Float32bits(y.Bias) ||
				x.Count != y.Count || x.Last != y.Last {
				t.Fatalf("%v row %d differs: %+v and %+v", side, x.Row, x, y)
			}
			for j := range x.Vec {
				if math.Float32bits(x.Vec[j]) != math.Float32bits(y.Vec[j]) {
					t.Fatalf("%v row %d factor %d: %v and %v", side, x.Row, j, x.Vec[j], y.Vec[j])
				}
			}
		}
	}
}

// holdEOF turns the wrapped source's io.EOF into empty batches until release
// is set.
type holdEOF struct {
	stream.Source
	release atomic.Bool
	last    stream.Position
	empty   stream.Batch
}

func (h *holdEOF) Next(ctx context.Context) (*stream.Batch, error) {
	b, err := h.Source.Next(ctx)
	if err == io.EOF && !h.release.Load() {
		time.Sleep(time.Millisecond)
		h.empty.Reset()
		h.empty.Pos = h.last
		return &h.empty, nil
	}
	if err == nil {
		h.last = b.Pos.Clone()
	}
	return b, err
}

// durableStore records which positions are durable after Append returns.
type durableStore struct {
	*checkpoint.Store
	ack      *ackCheck
	appends  atomic.Int64
	commits  atomic.Int64
	lastSeq  atomic.Uint64
	commitOK atomic.Bool
}

func (d *durableStore) Append(rows *online.RowSet, meta *online.Meta) error {
	if err := d.Store.Append(rows, meta); err != nil {
		return err
	}
	d.appends.Add(1)
	d.lastSeq.Store(meta.Seq)
	d.ack.mu.Lock()
	d.ack.durable[meta.Position.Offset] = true
	d.ack.mu.Unlock()
	return nil
}

func (d *durableStore) Commit(meta *online.Meta) error {
	if meta.Seq != d.lastSeq.Load() {
		return fmt.Errorf("commit at seq %d, last append %d", meta.Seq, d.lastSeq.Load())
	}
	d.commits.Add(1)
	return d.Store.Commit(meta)
}

func newPair(t testing.TB, rank int) (*online.Model, *online.Monitor) {
	t.Helper()
	m, err := online.New(online.Options{Rank: rank, Seed: 7})
	if err != nil {
		t.Fatal(err)
	}
	mon, err := online.NewMonitor(online.MonitorOptions{})
	if err != nil {
		t.Fatal(err)
	}
	return m, mon
}

// TestTrainerRecoversExactly runs the trainer on a finite scenario with a
// real checkpoint store, snapshots taken in chunks of 200 rows (so each
// snapshot spans many batches while rows keep changing), then recovers the
// directory into a fresh model: every row, bias and count must equal the live
// model's bit for bit, and the monitor state must match.
func TestTrainerRecoversExactly(t *testing.T) {
	const events = 100000
	dir := t.TempDir()
	sc, err := stream.NewScenario(stream.ScenarioOptions{Seed: 3, Events: events, Listeners: 2000, Shows: 300,
		ClipMin: 1, ClipMax: 5, Mean: 3}, stream.Position{})
	if err != nil {
		t.Fatal(err)
	}
	store, err := checkpoint.Open(checkpoint.Options{Dir: dir})
	if err != nil {
		t.Fatal(err)
	}
	m, mon := newPair(t, 8)
	if _, _, err := store.Recover(m.ApplyRecord); err != nil {
		t.Fatal(err)
	}
	// The scenario may end before a snapshot on a slow disk completes; hold
	// the end back (with empty batches, as an idle source gives) until one
	// has been committed.
	held := &holdEOF{Source: sc}
	ack := &ackCheck{Source: held, t: t, durable: map[int64]bool{}}
	ds := &durableStore{Store: store, ack: ack}
	var snaps []online.SnapshotStats
	var snapMu sync.Mutex
	tr, err := online.NewTrainer(online.TrainerOptions{
		Model: m, Monitor: mon, Source: ack, Checkpoint: ds,
		FlushInterval: time.Millisecond, SnapshotInterval: time.Millisecond, SnapshotChunk: 200,
		Progress: -1, Logger: zaptest.NewLogger(t),
		OnSnapshot: func(s online.SnapshotStats) {
			snapMu.Lock()
			snaps = append(snaps, s)
			snapMu.Unlock()
			held.release.Store(true)
		},
	})
	if err != nil {
		t.Fatal(err)
	}
	if err := tr.Run(context.Background()); err != nil {
		t.Fatal(err)
	}
	if err := store.Close(); err != nil {
		t.Fatal(err)
	}
	if got := tr.Counts().Applied; got != events {
		t.Fatalf("applied %d events, want %d", got, events)
	}
	if len(snaps) == 0 || ds.commits.Load() == 0 {
		t.Fatalf("no snapshot was committed (appends %d)", ds.appends.Load())
	}
	if n := len(ack.commits); n == 0 || ack.commits[n-1] != events {
		t.Fatalf("last committed offset %v, want %d", ack.commits[max(0, n-1):], events)
	}

	// Recover into a fresh model and compare.
	store2, err := checkpoint.Open(checkpoint.Options{Dir: dir})
	if err != nil {
		t.Fatal(err)
	}
	defer store2.Close()
	m2, mon2 := newPair(t, 8)
	meta, info, err := store2.Recover(m2.ApplyRecord)
	if err != nil {
		t.Fatal(err)
	}
	if info.Snapshot == "" {
		t.Fatalf("recovery did not start from a snapshot: %+v", info)
	}
	if err := m2.Restore(meta.Model); err != nil {
		t.Fatal(err)
	}
	if err := mon2.UnmarshalState(meta.Monitor); err != nil {
		t.Fatal(err)
	}
	if meta.Position.Offset != events || meta.Counts.Applied != events {
		t.Fatalf("recovered position %v, applied %d; want %d", meta.Position, meta.Counts.Applied, events)
	}
	requireSameRows(t, m, m2)
	if m.Mean() != m2.Mean() {
		t.Errorf("mean: live %v, recovered %v", m.Mean(), m2.Mean())
	}
	if a, b := mon.Status(), mon2.Status(); a != b {
		t.Errorf("monitor status differs:\nlive      %+v\nrecovered %+v", a, b)
	}
	t.Logf("%d snapshots, %d appends; last snapshot %+v", len(snaps), ds.appends.Load(), snaps[len(snaps)-1])
}

// randomSource yields events over a fixed population of users and items, at
// random (uniform rows: the out-of-cache case).
type randomSource struct {
	users, items int
	rng          *rand.Rand
	b            stream.Batch
	n            int64
	stop         atomic.Bool
	ubuf, ibuf   []byte
}

func (s *randomSource) Next(ctx context.Context) (*stream.Batch, error) {
	if s.stop.Load() {
		return nil, io.EOF
	}
	s.b.Reset()
	for range 256 {
		s.ubuf = fmt.Appendf(s.ubuf[:0], "u%07d", s.rng.IntN(s.users))
		s.ibuf = fmt.Appendf(s.ibuf[:0], "i%06d", s.rng.IntN(s.items))
		s.b.Add(stream.Event{User: s.ubuf, Item: s.ibuf, Value: float64(1 + s.rng.IntN(5)), Time: s.n})
		s.n++
	}
	s.b.Pos = stream.Position{Source: "scenario", Offset: s.n}
	return &s.b, nil
}
func (s *randomSource) Commit(context.Context, stream.Position) error { return nil }
func (s *randomSource) Close() error                                  { return nil }

// BenchmarkSnapshotStall measures what a full snapshot costs the trainer at
// 2M users × 200k items, k = 64 (with -short: 200k × 20k): the longest pause
// of any batch boundary while the snapshot is copied (target ≤ 50 ms), the
// total copy time, the wall time to a committed snapshot, and the peak extra
// Go heap while it is written (the tables themselves are outside the heap
// where huge-page mappings are available).
func BenchmarkSnapshotStall(b *testing.B) {
	users, items := 2_000_000, 200_000
	if testing.Short() {
		users, items = 200_000, 20_000
	}
	m, mon := newPair(b, 64)
	for u := range users {
		if _, _, err := m.Intern(online.Users, fmt.Appendf(nil, "u%07d", u), 0); err != nil {
			b.Fatal(err)
		}
	}
	for i := range items {
		if _, _, err := m.Intern(online.Items, fmt.Appendf(nil, "i%06d", i), 0); err != nil {
			b.Fatal(err)
		}
	}
	// The bulk load left every row dirty; a running trainer never has more
	// than FlushRows dirty rows, so drop the marks to measure the steady state.
	var discard online.RowSet
	m.TakeDirty(online.ConsumerLog, &discard)
	discard = online.RowSet{}
	dir := b.TempDir()
	store, err := checkpoint.Open(checkpoint.Options{Dir: dir})
	if err != nil {
		b.Fatal(err)
	}
	defer store.Close()
	if _, _, err := store.Recover(m.ApplyRecord); err != nil {
		b.Fatal(err)
	}
	var ms runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&ms)
	base := ms.HeapInuse
	b.ResetTimer()
	var last online.SnapshotStats
	var peak uint64
	for range b.N {
		src := &randomSource{users: users, items: items, rng: rand.New(rand.NewPCG(1, 2))}
		done := make(chan online.SnapshotStats, 1)
		tr, err := online.NewTrainer(online.TrainerOptions{
			Model: m, Monitor: mon, Source: src, Checkpoint: store,
			SnapshotInterval: time.Nanosecond, Progress: -1,
			OnSnapshot: func(s online.SnapshotStats) {
				select {
				case done <- s:
				default:
				}
			},
		})
		if err != nil {
			b.Fatal(err)
		}
		stopPoll := make(chan struct{})
		var wg sync.WaitGroup
		wg.Go(func() {
			var ms runtime.MemStats
			for {
				select {
				case <-stopPoll:
					return
				case <-time.After(20 * time.Millisecond):
				}
				runtime.ReadMemStats(&ms)
				if ms.HeapInuse > base && ms.HeapInuse-base > peak {
					peak = ms.HeapInuse - base
				}
			}
		})
		wg.Go(func() {
			last = <-done
			src.stop.Store(true)
		})
		if err := tr.Run(context.Background()); err != nil {
			b.Fatal(err)
		}
		close(stopPoll)
		wg.Wait()
	}
	b.ReportMetric(float64(last.StallMax.Microseconds())/1000, "stall-max-ms")
	b.ReportMetric(float64(last.CopyTime.Microseconds())/1000, "copy-ms")
	b.ReportMetric(last.Took.Seconds(), "snapshot-s")
	b.ReportMetric(float64(last.Rows), "rows")
	b.ReportMetric(float64(peak)/(1<<20), "extra-heap-MB")
}

// recorder is an in-memory Checkpointer that records the protocol calls.
type recorder struct {
	mu    sync.Mutex
	calls []string
	metas []*online.Meta
}

func (r *recorder) add(call string, m *online.Meta) {
	r.mu.Lock()
	r.calls = append(r.calls, call)
	if m != nil {
		r.metas = append(r.metas, m.Clone())
	}
	r.mu.Unlock()
}
func (r *recorder) Append(_ *online.RowSet, m *online.Meta) error { r.add("append", m); return nil }
func (r *recorder) BeginSnapshot(m *online.Meta) error            { r.add("begin", m); return nil }
func (r *recorder) WriteRows(*online.RowSet) error                { r.add("rows", nil); return nil }
func (r *recorder) Commit(m *online.Meta) error                   { r.add("commit", m); return nil }
func (r *recorder) Purge() error                                  { r.add("purge", nil); return nil }

// TestTrainerResumesPendingPurge: a daemon that stopped (or crashed) after an
// erasure but before the snapshot that purges older checkpoint files resumes
// from a cut marked Purge, and must take that snapshot and purge at once.
func TestTrainerResumesPendingPurge(t *testing.T) {
	sc, err := stream.NewScenario(stream.ScenarioOptions{Seed: 5, Events: 20000, Listeners: 300, Shows: 50}, stream.Position{})
	if err != nil {
		t.Fatal(err)
	}
	m, mon := newPair(t, 4)
	rec := &recorder{}
	tr, err := online.NewTrainer(online.TrainerOptions{
		Model: m, Monitor: mon, Source: sc, Checkpoint: rec, Progress: -1,
		SnapshotInterval: time.Hour, // no snapshot would be due by time
		Resume:           &online.Meta{Rank: 4, Mode: "explicit", Seq: 7, Purge: true},
	})
	if err != nil {
		t.Fatal(err)
	}
	if err := tr.Run(context.Background()); err != nil {
		t.Fatal(err)
	}
	rec.mu.Lock()
	defer rec.mu.Unlock()
	var begin, commit, purge int
	for i, c := range rec.calls {
		switch c {
		case "begin":
			begin++
			if i == 0 || rec.calls[i-1] != "append" {
				t.Errorf("the purging snapshot did not start right after a cut: calls %v", rec.calls[:i+1])
			}
		case "commit":
			commit++
		case "purge":
			purge++
			if rec.calls[i-1] != "commit" {
				t.Errorf("purge not right after a commit: %v", rec.calls[max(0, i-3):i+1])
			}
		}
	}
	if begin != 1 || commit != 1 || purge != 1 {
		t.Fatalf("begin %d, commit %d, purge %d; want one each (calls %v)", begin, commit, purge, rec.calls)
	}
	if !rec.metas[0].Purge {
		t.Errorf("the first cut after resuming does not carry the pending purge")
	}
}

// eraseEvery wraps a source and turns every 97th event into an erasure of
// that event's user, so erasures land at every position within the groups
// of 16 and the batches.
type eraseEvery struct {
	stream.Source
	n int
}

func (e *eraseEvery) Next(ctx context.Context) (*stream.Batch, error) {
	b, err := e.Source.Next(ctx)
	if err != nil {
		return b, err
	}
	for i := range b.Events {
		if e.n++; e.n%97 == 0 {
			b.Events[i].Kind = stream.EraseUser
		}
	}
	return b, nil
}

// TestTrainerMatchesSequentialLoop checks the trainer's grouping (IDs
// resolved and rows prefetched a group ahead of the steps) against the plain
// definition: for each event in order, intern both IDs, step, or erase. The
// two models must be equal bit for bit.
func TestTrainerMatchesSequentialLoop(t *testing.T) {
	opts := stream.ScenarioOptions{Seed: 9, Events: 30000, Listeners: 400, Shows: 80}
	sc, err := stream.NewScenario(opts, stream.Position{})
	if err != nil {
		t.Fatal(err)
	}
	m1, mon1 := newPair(t, 8)
	tr, err := online.NewTrainer(online.TrainerOptions{
		Model: m1, Monitor: mon1, Source: &eraseEvery{Source: sc}, Checkpoint: &recorder{}, Progress: -1,
	})
	if err != nil {
		t.Fatal(err)
	}
	if err := tr.Run(context.Background()); err != nil {
		t.Fatal(err)
	}

	sc2, err := stream.NewScenario(opts, stream.Position{})
	if err != nil {
		t.Fatal(err)
	}
	src := &eraseEvery{Source: sc2}
	m2, _ := newPair(t, 8)
	var erased int
	for {
		b, err := src.Next(context.Background())
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		for _, ev := range b.Events {
			if ev.Kind == stream.EraseUser {
				m2.Erase(online.Users, ev.User)
				erased++
				continue
			}
			u, _, err := m2.Intern(online.Users, ev.User, ev.Time)
			if err != nil {
				continue
			}
			i, _, err := m2.Intern(online.Items, ev.Item, ev.Time)
			if err != nil {
				continue
			}
			if _, err := m2.Step(u, i, ev.Value, ev.Time); err != nil {
				t.Fatal(err)
			}
		}
	}
	if erased == 0 || tr.Counts().Erased != uint64(erased) {
		t.Fatalf("erasures: trainer %d, loop %d", tr.Counts().Erased, erased)
	}
	requireSameRows(t, m1, m2)
}

// BenchmarkTrainer measures the trainer's whole per-event path (ID
// resolution with staged prefetching, scoring, the step, the monitor, log
// cuts to an in-memory checkpointer) on the demo scenario: 1M ratings over
// 50k listeners and 5k shows, k = 32. The scenario is generated in the
// trainer's goroutine, so its cost (about a third) is included.
func BenchmarkTrainer(b *testing.B) {
	events := int64(1_000_000)
	if testing.Short() {
		events = 100_000
	}
	for range b.N {
		sc, err := stream.NewScenario(stream.ScenarioOptions{Seed: 1, Events: events, Listeners: 50000, Shows: 5000,
			ArrivalsUntil: events / 10}, stream.Position{})
		if err != nil {
			b.Fatal(err)
		}
		m, err := online.New(online.Options{Rank: 32, Seed: 1})
		if err != nil {
			b.Fatal(err)
		}
		mon, err := online.NewMonitor(online.MonitorOptions{})
		if err != nil {
			b.Fatal(err)
		}
		tr, err := online.NewTrainer(online.TrainerOptions{Model: m, Monitor: mon, Source: sc, Checkpoint: &recorder{}, Progress: -1})
		if err != nil {
			b.Fatal(err)
		}
		if err := tr.Run(context.Background()); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(events)*float64(b.N)/b.Elapsed().Seconds(), "events/s")
}
