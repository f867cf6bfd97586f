package online

import (
	"context"
	"errors"
	"fmt"
	"io"
	"sync"
	"sync/atomic"
	"time"

	"go.uber.org/zap"

	"freshet.dev/freshet/stream"
)

// Trainer defaults.
const (
	DefaultFlushInterval    = time.Second
	DefaultFlushRows        = 50000
	DefaultSnapshotInterval = 5 * time.Minute
	DefaultSnapshotChunk    = 1 << 14
	DefaultSnapshotLogBytes = 512 << 20
	DefaultOfferInterval    = 100 * time.Millisecond
	DefaultProgress         = 5 * time.Second
	DefaultRecallRate       = 50
	// touchGroup is how many events' rows are touched before they are
	// stepped, so that their cache misses overlap (REFERENCES: 2–3× out of
	// cache).
	touchGroup = 16
)

// TrainerOptions configure a Trainer. A zero field takes the default named in
// its comment.
type TrainerOptions struct {
	Model   *Model   // required
	Monitor *Monitor // required
	Source  stream.Source
	// Checkpoint makes cuts durable; required (the embedded run uses local
	// checkpoints too).
	Checkpoint Checkpointer
	// Publisher receives changed rows for the serving copy; nil for none.
	Publisher Publisher
	// Resume is the meta of the restored checkpoint; nil for a new model.
	Resume *Meta
	// Reapply is the number of events the previous process applied beyond
	// Resume (from the checkpoint's mark): they are delivered again and
	// counted in Counts.Reapplied.
	Reapply uint64
	Logger  *zap.Logger // nil: no logging

	// FlushInterval is the longest time between durable cuts; default 1s.
	FlushInterval time.Duration
	// FlushRows forces a cut when this many rows are dirty; default 50000.
	FlushRows int
	// SnapshotInterval is the time between full snapshots; default 5m.
	// Negative disables periodic snapshots.
	SnapshotInterval time.Duration
	// SnapshotLogBytes starts a snapshot early once the checkpoint's log
	// holds this many bytes (when the Checkpointer reports its size with a
	// LogBytes method), bounding recovery time; default 512 MiB.
	SnapshotLogBytes int64
	// SnapshotChunk is the number of rows copied per batch boundary while a
	// snapshot or a full publish is in progress; default 16384.
	SnapshotChunk int
	// OfferInterval is the time between hand-overs of changed rows to the
	// Publisher; default 100ms.
	OfferInterval time.Duration
	// Progress is the interval between progress log lines; default 5s.
	// Negative turns the periodic line off (the final one is still logged).
	Progress time.Duration
	// RecallRate caps sampled recall@N evaluations (implicit mode) per second
	// of wall time; default 50; negative turns sampling off. RecallEvery,
	// when positive, replaces the cap with a deterministic sample of every
	// n-th event (offline evaluation).
	RecallRate  float64
	RecallEvery int
	// TopN is the N of recall@N; default 10.
	TopN int
	// MaxRate paces the stream to at most this many events per second of wall
	// time (the demo); zero for as fast as the source goes.
	MaxRate float64
	// OnAlarm, when set, is called for each drift alarm (after it is logged).
	OnAlarm func(Alarm)
	// ProgressFields, when set, adds fields to each progress line (the
	// serving writer's state, say). It is called from the trainer goroutine.
	ProgressFields func() []zap.Field
	// OnErase, when set, is called after an erasure event is applied to the
	// model, with the side and the ID (valid only during the call), so that
	// copies outside the model (the rejects file) can be purged too.
	OnErase func(side Side, id []byte) error
	// OnSnapshot, when set, is called by the checkpoint writer goroutine
	// after each snapshot is committed.
	OnSnapshot func(SnapshotStats)
	// Curve, when set, is called at the first batch boundary after every
	// CurveEvery applied events (default 1000), for prequential curves.
	Curve      func(Counts, MonitorStatus)
	CurveEvery uint64

	// now is the wall clock (tests may replace it).
	now func() time.Time
}

// Alarm is a drift alarm raised by the monitor.
type Alarm struct {
	Event  uint64 // index of the event (Counts.Applied after it)
	Time   int64  // model time (ms)
	Status MonitorStatus
}

// A Marker is a Checkpointer that can cheaply record, without making it
// durable, how many events have been applied so far; after a process crash
// the next recovery compares it with the recovered cut to count the events
// applied again (TrainerOptions.Reapply). The trainer marks at every batch
// boundary.
type Marker interface {
	Mark(applied uint64) error
}

// A Purger is a Checkpointer that can delete every checkpoint file older
// than its newest committed snapshot. After an erasure the trainer takes a
// snapshot at once and purges when it is committed, so no retained file holds
// the erased rows.
type Purger interface {
	Purge() error
}

// SnapshotStats describe one full snapshot.
type SnapshotStats struct {
	Seq    uint64 // the cut the snapshot is complete at
	Rows   int    // live rows written
	Chunks int    // chunks copied, one per batch boundary at most
	// CopyTime is the trainer's time spent copying rows, summed over the
	// chunks; StallMax is the longest any one batch boundary spent on
	// snapshot work (copy and hand-off): the pause the trainer saw.
	CopyTime time.Duration
	StallMax time.Duration
	// Took is the wall time from the start of the snapshot to its commit.
	Took time.Duration
}

// TrainerStatus is a snapshot of a running trainer, published at batch
// boundaries (at most every 100 ms) for health checks, a status page and
// metrics. Plain data.
type TrainerStatus struct {
	Running  bool            `json:"running"`  // Run has started and not returned
	Draining bool            `json:"draining"` // the drain has begun
	Seq      uint64          `json:"seq"`      // newest cut taken
	Durable  uint64          `json:"durable"`  // newest cut made durable
	Commits  uint64          `json:"commits"`  // positions acknowledged to the source
	Position stream.Position `json:"position"`
	Time     int64           `json:"time"` // model time, ms
	Counts   Counts          `json:"counts"`
	Users    int             `json:"users"`
	Items    int             `json:"items"`
	// EventsPerS is the rate over the last progress interval.
	EventsPerS   float64       `json:"events_per_s"`
	DriftAlarms  uint64        `json:"drift_alarms"`
	Monitor      MonitorStatus `json:"monitor"`
	LastSnapshot SnapshotStats `json:"last_snapshot"`
	Updated      time.Time     `json:"updated"`
}

// Trainer owns the model's tables and drives them from a Source: for each
// event it scores, then learns (test-then-train), and at batch boundaries it
// hands copies of changed rows to the checkpoint writer and the publisher.
//
// # Drain order
//
// When Run's context is cancelled (SIGTERM) or the source ends, the trainer
//  1. stops fetching and finishes the batch in hand;
//  2. takes a final cut and waits until the checkpoint writer has made it
//     durable;
//  3. acknowledges that cut's position to the source (Kafka commit);
//  4. hands the last changed rows to the publisher (its own Close flushes
//     them);
//  5. logs a final progress line and returns nil.
//
// A snapshot in progress is abandoned: the previous snapshot and the logs
// still recover the exact state.
type Trainer struct {
	o    TrainerOptions
	m    *Model
	mode Mode
	mon  *Monitor
	src  stream.Source
	log  *zap.Logger

	seq    uint64
	pos    stream.Position
	time   int64
	counts Counts

	// writer hand-off
	jobs  chan job
	free  chan *RowSet
	wdone chan struct{}
	// queued jobs by kind, so that log cuts and snapshot chunks share the
	// writer without starving each other
	pendingAppends atomic.Int32
	pendingChunks  atomic.Int32
	ackMu          sync.Mutex
	acked          *Meta // newest durable cut not yet acknowledged to the source
	werr           error
	commits        uint64

	// cut bookkeeping
	lastFlush    time.Time
	lastFlushSeq uint64
	flushedPos   stream.Position
	flushedAny   bool

	// snapshot and full-publish cursors
	snap      cursor
	snapStats SnapshotStats
	snapStart time.Time
	// purge is set by an erasure: the next snapshot starts at once, and once
	// it is committed older checkpoint files are deleted (Purger).
	purge     bool
	snapPurge bool
	// purgeInFlight is set when a purging snapshot's commit is queued and
	// cleared by the writer once the older files are deleted.
	purgeInFlight atomic.Bool
	lastSnap      time.Time
	full          cursor
	lastOffer     time.Time
	stallMax      time.Duration

	// recall sampling
	scores     []float32
	recallTok  float64
	lastRefill time.Time

	// curve
	nextCurve uint64

	// pacing
	paceStart  time.Time
	paceEvents uint64

	// status
	status     atomic.Pointer[TrainerStatus]
	lastStatus time.Time
	lastRate   float64
	durable    atomic.Uint64
	lastSnapSt atomic.Pointer[SnapshotStats]

	// progress
	lastProg       time.Time
	lastProgEvents uint64
	alarms         uint64
	startApplied   uint64

	// group holds the resolved rows of the group being stepped and of the
	// next one, whose rows are being prefetched meanwhile.
	group [2]eventGroup
}

type eventGroup struct {
	evs    [touchGroup]groupEv
	n      int
	fu, fi [touchGroup]uint32 // ID fingerprints, for prefetchIDs
}

type groupEv struct {
	ev         *stream.Event
	u, i       int32
	newU, newI bool
	ok         bool
}

// cursor walks both tables a chunk at a time, up to the row counts they had
// when it started: rows created later reach the checkpoint log and the
// publisher through their dirty marks, and chasing them could never end
// while new IDs keep arriving.
type cursor struct {
	on   bool
	side Side
	row  int32
	end  [2]int32
}

// newCursor starts a walk over the rows that exist now.
func (t *Trainer) newCursor() cursor {
	return cursor{on: true, end: [2]int32{t.m.Rows(Users), t.m.Rows(Items)}}
}

type jobKind uint8

const (
	jobAppend jobKind = iota
	jobBegin
	jobRows
	jobCommit
)

type job struct {
	kind  jobKind
	rows  *RowSet
	meta  *Meta
	stats SnapshotStats // jobCommit
	start time.Time     // jobCommit: when the snapshot began
	purge bool          // jobCommit: delete older checkpoint files after it
}

// NewTrainer checks o and returns a Trainer ready to Run.
func NewTrainer(o TrainerOptions) (*Trainer, error) {
	if o.Model == nil || o.Monitor == nil || o.Source == nil || o.Checkpoint == nil {
		return nil, errors.New("online: trainer needs a model, a monitor, a source and a checkpointer")
	}
	if o.FlushInterval <= 0 {
		o.FlushInterval = DefaultFlushInterval
	}
	if o.FlushRows <= 0 {
		o.FlushRows = DefaultFlushRows
	}
	if o.SnapshotInterval == 0 {
		o.SnapshotInterval = DefaultSnapshotInterval
	}
	if o.SnapshotLogBytes <= 0 {
		o.SnapshotLogBytes = DefaultSnapshotLogBytes
	}
	if o.SnapshotChunk <= 0 {
		o.SnapshotChunk = DefaultSnapshotChunk
	}
	if o.OfferInterval <= 0 {
		o.OfferInterval = DefaultOfferInterval
	}
	if o.Progress == 0 {
		o.Progress = DefaultProgress
	} else if o.Progress < 0 {
		o.Progress = time.Duration(1<<63 - 1)
	}
	if o.RecallRate == 0 {
		o.RecallRate = DefaultRecallRate
	}
	if o.CurveEvery == 0 {
		o.CurveEvery = 1000
	}
	if o.TopN <= 0 {
		o.TopN = 10
	}
	if o.Logger == nil {
		o.Logger = zap.NewNop()
	}
	if o.now == nil {
		o.now = time.Now
	}
	t := &Trainer{
		o:     o,
		m:     o.Model,
		mode:  o.Model.Options().Mode,
		mon:   o.Monitor,
		src:   o.Source,
		log:   o.Logger,
		jobs:  make(chan job, 8),
		free:  make(chan *RowSet, 8),
		wdone: make(chan struct{}),
	}
	if r := o.Resume; r != nil {
		t.seq = r.Seq
		t.pos = r.Position.Clone()
		t.time = r.Time
		t.counts = r.Counts
		t.flushedPos = t.pos.Clone()
		t.flushedAny = true
		t.lastFlushSeq = r.Seq
		t.purge = r.Purge // an erasure's purge did not complete before the stop
	}
	t.counts.Reapplied += o.Reapply
	t.startApplied = t.counts.Applied
	t.m.Track(ConsumerLog, true)
	t.m.Track(ConsumerPublish, o.Publisher != nil)
	return t, nil
}

// Run consumes the source until ctx is done or a finite source ends, then
// drains in the order written on Trainer and returns nil. It returns an error
// when the source or the checkpoint writer fails; the state up to the last
// durable cut is safe either way.
func (t *Trainer) Run(ctx context.Context) error {
	go t.writer()
	now := t.o.now()
	t.lastFlush, t.lastSnap, t.lastOffer, t.lastProg, t.lastRefill, t.paceStart = now, now, now, now, now, now
	t.lastProgEvents = t.counts.Applied
	t.recallTok = t.o.RecallRate
	if t.o.Resume != nil {
		t.log.Info("resumed", zap.Stringer("position", t.o.Resume.Position),
			zap.Uint64("events", t.counts.Applied), zap.Uint64("seq", t.seq),
			zap.Uint64("reapply", t.o.Reapply), zap.Uint64("reapplied", t.counts.Reapplied),
			zap.Int("users", t.m.Live(Users)), zap.Int("items", t.m.Live(Items)))
	}

	t.publishStatus(now, false)
	var runErr error
	for {
		if ctx.Err() != nil {
			break
		}
		b, err := t.src.Next(ctx)
		if err != nil {
			if errors.Is(err, io.EOF) {
				t.log.Info("source ended", zap.Stringer("position", t.pos))
			} else if ctx.Err() == nil {
				runErr = fmt.Errorf("read source: %w", err)
			}
			break
		}
		t.apply(b)
		t.pos = b.Pos.Clone()
		t.counts.Rejected += uint64(b.Rejected)
		if err := t.afterBatch(ctx); err != nil {
			runErr = err
			break
		}
		t.pace(ctx)
	}
	return errors.Join(runErr, t.drain())
}

// drain makes the final cut durable, acknowledges it and stops the writer.
func (t *Trainer) drain() error {
	t.publishStatus(t.o.now(), true)
	defer func() {
		st := *t.status.Load()
		st.Running = false
		t.status.Store(&st)
	}()
	// An erasure's snapshot (and the purge after its commit) must not be
	// abandoned: a restart would not know that older files still hold the
	// erased rows. Finish it here, first any snapshot in progress before it.
	for t.writerErr() == nil && (t.purge || (t.snap.on && t.snapPurge)) {
		if t.snap.on && t.pendingChunks.Load() >= 2 {
			time.Sleep(time.Millisecond) // the writer is behind
			continue
		}
		t.snapshotStep(t.o.now())
	}
	if t.writerErr() == nil {
		t.flush(true)
	}
	close(t.jobs)
	<-t.wdone
	err := t.writerErr()
	if err == nil {
		// The context may be cancelled already: the commit gets its own
		// short deadline.
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		err = t.ack(ctx)
		cancel()
	}
	if p := t.o.Publisher; p != nil {
		rs := t.rowSet()
		t.m.TakeDirty(ConsumerPublish, rs)
		p.Offer(rs, t.meta())
	}
	t.progress(t.o.now(), "stopped")
	t.publishStatus(t.o.now(), true)
	return err
}

// publishStatus stores a fresh TrainerStatus for Status.
func (t *Trainer) publishStatus(now time.Time, draining bool) {
	t.lastStatus = now
	st := &TrainerStatus{
		Running:     true,
		Draining:    draining,
		Seq:         t.seq,
		Durable:     t.durable.Load(),
		Commits:     t.commits,
		Position:    t.pos.Clone(),
		Time:        t.time,
		Counts:      t.counts,
		Users:       t.m.Live(Users),
		Items:       t.m.Live(Items),
		EventsPerS:  t.lastRate,
		DriftAlarms: t.alarms,
		Monitor:     t.mon.Status(),
		Updated:     now,
	}
	if s := t.lastSnapSt.Load(); s != nil {
		st.LastSnapshot = *s
	}
	t.status.Store(st)
}

// Status returns the newest published TrainerStatus (the zero value before
// Run starts). Safe for concurrent use.
func (t *Trainer) Status() TrainerStatus {
	if st := t.status.Load(); st != nil {
		return *st
	}
	return TrainerStatus{}
}

// apply scores and learns every event of b, in order. Events are resolved
// (their IDs looked up or interned) and their rows prefetched a group of 16
// at a time, one group ahead of the one being stepped, so the rows' cache
// misses overlap with useful work. An erasure closes a group and is applied
// only after every event before it has been stepped, so row reuse stays in
// event order; new IDs are interned in event order too.
func (t *Trainer) apply(b *stream.Batch) {
	evs := b.Events
	cur, cn, stop := t.resolveGroup(0, evs)
	evs = evs[cn:]
	for {
		var next, nn int
		if !stop && len(evs) > 0 {
			next, nn, stop = t.resolveGroup(1-cur, evs)
			evs = evs[nn:]
		}
		t.stepGroup(cur)
		if nn == 0 {
			if stop && len(evs) > 0 {
				t.erase(&evs[0]) // the erasure that closed the group
				evs = evs[1:]
			}
			if len(evs) == 0 {
				return
			}
			cur, cn, stop = t.resolveGroup(0, evs)
			evs = evs[cn:]
			continue
		}
		cur = next
	}
}

// resolveGroup resolves up to touchGroup leading interactions of evs into
// group buffer g and prefetches their rows. It reports how many events it
// took and whether it stopped at an erasure.
func (t *Trainer) resolveGroup(g int, evs []stream.Event) (int, int, bool) {
	grp := &t.group[g]
	t.prefetchIDs(grp, evs)
	grp.n = 0
	for grp.n < len(evs) && grp.n < touchGroup {
		ev := &evs[grp.n]
		if ev.Kind != stream.Interaction {
			return g, grp.n, true
		}
		e := &grp.evs[grp.n]
		e.ev = ev
		e.ok = t.resolve(e)
		if e.ok {
			t.m.Touch(e.u, e.i)
		}
		grp.n++
	}
	return g, grp.n, false
}

// prefetchIDs starts the index loads of the next group's IDs in three stages
// (slots, row refs, ID bytes; see index.prefetchSlot), so that the lookups in
// resolveGroup find their lines in cache.
func (t *Trainer) prefetchIDs(grp *eventGroup, evs []stream.Event) {
	n := min(len(evs), touchGroup)
	ui, ii := &t.m.idx[Users], &t.m.idx[Items]
	for j := range n {
		grp.fu[j], grp.fi[j] = ui.fp(evs[j].User), ii.fp(evs[j].Item)
		ui.prefetchSlot(grp.fu[j])
		ii.prefetchSlot(grp.fi[j])
	}
	for j := range n {
		ui.prefetchRef(grp.fu[j])
		ii.prefetchRef(grp.fi[j])
	}
	for j := range n {
		ui.prefetchBytes(grp.fu[j])
		ii.prefetchBytes(grp.fi[j])
	}
}

// stepGroup steps the resolved events of group buffer g.
func (t *Trainer) stepGroup(g int) {
	grp := &t.group[g]
	for j := 0; j < grp.n; j++ {
		if e := &grp.evs[j]; e.ok {
			t.step(e)
		}
	}
	grp.n = 0
}

func (t *Trainer) resolve(g *groupEv) bool {
	ev := g.ev
	var err error
	if g.u, g.newU, err = t.m.Intern(Users, ev.User, ev.Time); err != nil {
		t.counts.Refused++
		return false
	}
	if g.i, g.newI, err = t.m.Intern(Items, ev.Item, ev.Time); err != nil {
		t.counts.Refused++
		return false
	}
	return true
}

func (t *Trainer) step(g *groupEv) {
	ev := g.ev
	if ev.Time > t.time {
		t.time = ev.Time
	}
	var alarm bool
	if t.mode == Implicit && t.recallDue() {
		// Test first: is the item in the user's top N before learning it?
		t.scores = t.m.ScoresTo(t.scores, g.u)
		if t.mon.ObserveHit(InTopN(t.scores, g.i, t.o.TopN)) {
			alarm = true
		}
	}
	pred, err := t.m.Step(g.u, g.i, ev.Value, ev.Time)
	if err != nil {
		t.counts.NonFinite++
		t.log.Warn("step undone", zap.Error(err),
			zap.Uint64("events", t.counts.Applied), zap.Int32("partition", ev.Partition), zap.Int64("offset", ev.Offset))
		return
	}
	t.counts.Applied++
	if t.mode == Explicit {
		alarm = t.mon.ObserveRating(pred, ev.Value, g.newU, g.newI) || alarm
	} else {
		alarm = t.mon.ObservePositive(pred, g.newU, g.newI) || alarm
	}
	if alarm {
		t.alarm()
	}
}

func (t *Trainer) erase(ev *stream.Event) {
	side, id := Users, ev.User
	if ev.Kind == stream.EraseItem {
		side, id = Items, ev.Item
	}
	found := t.m.Erase(side, id)
	t.counts.Erased++
	t.purge = true
	if t.o.OnErase != nil {
		if err := t.o.OnErase(side, id); err != nil {
			t.log.Error("erase outside the model", zap.Stringer("side", side), zap.Error(err))
		}
	}
	// The ID itself is personal data: it is not logged.
	t.log.Info("erased", zap.Stringer("side", side), zap.Bool("found", found),
		zap.Int32("partition", ev.Partition), zap.Int64("offset", ev.Offset))
}

func (t *Trainer) alarm() {
	t.alarms++
	st := t.mon.Status()
	a := Alarm{Event: t.counts.Applied, Time: t.time, Status: st}
	t.log.Info("drift alarm",
		zap.Uint64("events", a.Event), zap.Int64("time", a.Time),
		zap.Float64("rmse", st.RMSEFading), zap.Float64("recall", st.RecallFading),
		zap.Float64("statistic", st.PHStat), zap.Uint64("ph_alarms", st.PHAlarms), zap.Uint64("adwin_alarms", st.ADWINAlarms))
	if t.o.OnAlarm != nil {
		t.o.OnAlarm(a)
	}
}

// recallDue reports whether this event is sampled for a recall@N evaluation.
func (t *Trainer) recallDue() bool {
	if n := t.o.RecallEvery; n > 0 {
		return (t.counts.Applied+t.counts.NonFinite)%uint64(n) == 0
	}
	if t.o.RecallRate > 0 && t.recallTok >= 1 {
		t.recallTok--
		return true
	}
	return false
}

// afterBatch runs the batch-boundary work: acknowledge durable cuts, take a
// cut when due, advance a snapshot or full publish by one chunk, offer
// changed rows to the publisher, log progress.
func (t *Trainer) afterBatch(ctx context.Context) error {
	if err := t.writerErr(); err != nil {
		return err
	}
	if err := t.ack(ctx); err != nil {
		return err
	}
	if mk, ok := t.o.Checkpoint.(Marker); ok {
		// Not durable, and not an error worth stopping for: it only
		// counts re-applied events after a crash.
		_ = mk.Mark(t.counts.Applied)
	}
	now := t.o.now()
	if el := now.Sub(t.lastRefill); el > 0 {
		t.recallTok = min(t.recallTok+el.Seconds()*t.o.RecallRate, t.o.RecallRate)
		t.lastRefill = now
	}

	if t.m.DirtyLen(ConsumerLog) >= t.o.FlushRows {
		t.flush(true)
	} else if now.Sub(t.lastFlush) >= t.o.FlushInterval {
		t.flush(false)
	}

	start := t.o.now()
	t.snapshotStep(now)
	t.publishStep(now)
	if d := t.o.now().Sub(start); d > t.stallMax {
		t.stallMax = d
	}

	if now.Sub(t.lastProg) >= t.o.Progress {
		t.progress(now, "progress")
	}
	if now.Sub(t.lastStatus) >= 100*time.Millisecond {
		t.publishStatus(now, false)
	}
	if t.o.Curve != nil && t.counts.Applied >= t.nextCurve {
		t.o.Curve(t.counts, t.mon.Status())
		t.nextCurve = (t.counts.Applied/t.o.CurveEvery + 1) * t.o.CurveEvery
	}
	return nil
}

// flush takes a cut: the rows changed since the previous cut and the meta of
// this batch boundary, handed to the writer. A routine cut is postponed to a
// later boundary while an earlier one is still queued (the next cut covers
// both); a forced one (too many dirty rows, or the drain) blocks when the
// writer is behind, which is the back-pressure that keeps memory bounded.
func (t *Trainer) flush(force bool) {
	if !force && t.pendingAppends.Load() > 0 {
		return
	}
	t.lastFlush = t.o.now()
	if t.flushedAny && t.m.DirtyLen(ConsumerLog) == 0 && positionEqual(t.pos, t.flushedPos) && t.seq == t.lastFlushSeq {
		return // nothing new since the last cut
	}
	rs := t.rowSet()
	t.m.TakeDirty(ConsumerLog, rs)
	t.seq++
	meta := t.meta()
	t.flushedPos, t.flushedAny, t.lastFlushSeq = t.pos.Clone(), true, t.seq
	t.send(job{kind: jobAppend, rows: rs, meta: meta})
}

// send queues j for the writer, counting it by kind.
func (t *Trainer) send(j job) {
	switch j.kind {
	case jobAppend:
		t.pendingAppends.Add(1)
	case jobRows:
		t.pendingChunks.Add(1)
	}
	t.jobs <- j
}

// snapshotStep starts a snapshot when one is due and copies the next chunk of
// an ongoing one while fewer than two chunks are queued: the trainer never
// waits on the disk for a snapshot, and at most two chunks of copies are in
// memory at once.
func (t *Trainer) snapshotStep(now time.Time) {
	if !t.snap.on {
		due := t.o.SnapshotInterval >= 0 && now.Sub(t.lastSnap) >= t.o.SnapshotInterval
		if lb, ok := t.o.Checkpoint.(interface{ LogBytes() int64 }); ok && lb.LogBytes() >= t.o.SnapshotLogBytes {
			due = true
		}
		if !due && !t.purge {
			return
		}
		if t.purge {
			// The cut before the snapshot holds the erasure's Deleted
			// record, so that record lands in a log the purge deletes.
			t.flush(true)
			t.purge, t.snapPurge = false, true
		} else {
			t.snapPurge = false
		}
		t.lastSnap = now
		t.snap = t.newCursor()
		t.snapStats = SnapshotStats{}
		t.snapStart = now
		t.jobs <- job{kind: jobBegin, meta: t.meta()}
		t.log.Info("snapshot started", zap.Uint64("seq", t.seq), zap.Int("users", t.m.Live(Users)), zap.Int("items", t.m.Live(Items)))
		return
	}
	if t.pendingChunks.Load() >= 2 {
		return // the writer is behind; try again at the next boundary
	}
	start := t.o.now()
	rs, done := t.copyChunk(&t.snap)
	if rs != nil {
		t.snapStats.Chunks++
		t.snapStats.Rows += rs.Len()
		t.snapStats.CopyTime += t.o.now().Sub(start)
		t.send(job{kind: jobRows, rows: rs})
	} else if done {
		// The last chunk is queued: one more cut, and the snapshot is
		// complete at that cut's meta.
		t.snap.on = false
		t.seq++ // a cut of its own even when nothing changed
		rs := t.rowSet()
		t.m.TakeDirty(ConsumerLog, rs)
		if t.snapPurge {
			// Until the writer has deleted the older files, cuts (this one
			// included) say a purge is pending.
			t.purgeInFlight.Store(true)
		}
		meta := t.meta()
		t.flushedPos, t.flushedAny, t.lastFlushSeq, t.lastFlush = t.pos.Clone(), true, t.seq, t.o.now()
		t.snapStats.Seq = meta.Seq
		t.send(job{kind: jobAppend, rows: rs, meta: meta})
		t.send(job{kind: jobCommit, meta: meta, stats: t.snapStats, start: t.snapStart, purge: t.snapPurge})
	}
	if d := t.o.now().Sub(start); d > t.snapStats.StallMax {
		t.snapStats.StallMax = d
	}
}

// publishStep offers changed rows to the publisher on its interval and runs a
// full publish chunk by chunk when the publisher asks for one.
func (t *Trainer) publishStep(now time.Time) {
	p := t.o.Publisher
	if p == nil {
		return
	}
	if !t.full.on && p.WantFull() {
		t.full = t.newCursor()
		t.log.Info("full publish started", zap.Int("users", t.m.Live(Users)), zap.Int("items", t.m.Live(Items)))
	}
	if t.full.on {
		if rs, done := t.copyChunk(&t.full); rs != nil {
			p.OfferFull(rs)
		} else if done {
			t.full.on = false
			// Rows changed during the full publish follow through Offer
			// before EndFull, so the new version holds them before it goes
			// live.
			rs := t.rowSet()
			t.m.TakeDirty(ConsumerPublish, rs)
			meta := t.meta()
			p.Offer(rs, meta)
			p.EndFull(meta)
			t.lastOffer = now
			return
		}
	}
	if now.Sub(t.lastOffer) >= t.o.OfferInterval {
		t.lastOffer = now
		rs := t.rowSet()
		t.m.TakeDirty(ConsumerPublish, rs)
		p.Offer(rs, t.meta())
	}
}

// copyChunk copies the next SnapshotChunk rows under c. It returns nil and
// done=true once both sides are covered.
func (t *Trainer) copyChunk(c *cursor) (rs *RowSet, done bool) {
	for c.side <= Items {
		end := min(c.end[c.side], t.m.Rows(c.side))
		if c.row >= end {
			c.side++
			c.row = 0
			continue
		}
		to := min(c.row+int32(t.o.SnapshotChunk), end)
		rs = t.rowSet()
		t.m.CopyRows(c.side, c.row, to, rs)
		c.row = to
		return rs, false
	}
	return nil, true
}

// rowSet returns a recycled RowSet (or a new one).
func (t *Trainer) rowSet() *RowSet {
	var rs *RowSet
	select {
	case rs = <-t.free:
	default:
		rs = new(RowSet)
	}
	rs.Reset(t.m.Rank())
	return rs
}

// meta returns the meta of the current batch boundary.
func (t *Trainer) meta() *Meta {
	mon, err := t.mon.MarshalState()
	if err != nil {
		// MarshalState encodes plain numbers; failing is a bug.
		panic(fmt.Sprintf("online: marshal monitor state: %v", err))
	}
	return &Meta{
		Format:   MetaFormat,
		Rank:     t.m.Rank(),
		Mode:     t.mode.String(),
		Seq:      t.seq,
		Position: t.pos.Clone(),
		Time:     t.time,
		Counts:   t.counts,
		Model:    t.m.Meta(),
		Monitor:  mon,
		Purge:    t.purge || (t.snap.on && t.snapPurge) || t.purgeInFlight.Load(),
	}
}

// writer is the checkpoint writer goroutine: it makes each job durable in
// order and records the newest durable cut for ack.
func (t *Trainer) writer() {
	defer close(t.wdone)
	cp := t.o.Checkpoint
	for j := range t.jobs {
		if t.writerErr() != nil {
			continue // drain the queue after a failure
		}
		var err error
		switch j.kind {
		case jobAppend:
			err = cp.Append(j.rows, j.meta)
		case jobBegin:
			err = cp.BeginSnapshot(j.meta)
		case jobRows:
			err = cp.WriteRows(j.rows)
		case jobCommit:
			err = cp.Commit(j.meta)
			if p, ok := cp.(Purger); ok && err == nil && j.purge {
				if err = p.Purge(); err == nil {
					t.purgeInFlight.Store(false)
				}
			}
			if err == nil {
				st := j.stats
				st.Took = t.o.now().Sub(j.start)
				t.log.Info("snapshot written", zap.Uint64("seq", st.Seq), zap.Int("rows", st.Rows),
					zap.Int("chunks", st.Chunks), zap.Duration("copy", st.CopyTime),
					zap.Duration("stall_max", st.StallMax), zap.Duration("duration", st.Took))
				t.lastSnapSt.Store(&st)
				if t.o.OnSnapshot != nil {
					t.o.OnSnapshot(st)
				}
			}
		}
		switch j.kind {
		case jobAppend:
			t.pendingAppends.Add(-1)
		case jobRows:
			t.pendingChunks.Add(-1)
		}
		if j.rows != nil {
			select {
			case t.free <- j.rows:
			default:
			}
		}
		t.ackMu.Lock()
		if err != nil {
			t.werr = fmt.Errorf("checkpoint: %w", err)
		} else if j.kind == jobAppend {
			t.acked = j.meta
			t.durable.Store(j.meta.Seq)
		}
		t.ackMu.Unlock()
	}
}

func (t *Trainer) writerErr() error {
	t.ackMu.Lock()
	defer t.ackMu.Unlock()
	return t.werr
}

// ack acknowledges the newest durable cut to the source.
func (t *Trainer) ack(ctx context.Context) error {
	t.ackMu.Lock()
	m := t.acked
	t.acked = nil
	t.ackMu.Unlock()
	if m == nil {
		return nil
	}
	if err := t.src.Commit(ctx, m.Position); err != nil {
		if ctx.Err() != nil {
			return nil
		}
		return fmt.Errorf("commit %s: %w", m.Position, err)
	}
	t.commits++
	return nil
}

// pace sleeps so the stream runs at no more than MaxRate events per second.
func (t *Trainer) pace(ctx context.Context) {
	if t.o.MaxRate <= 0 {
		return
	}
	t.paceEvents = t.counts.Applied - t.startApplied
	due := t.paceStart.Add(time.Duration(float64(t.paceEvents) / t.o.MaxRate * float64(time.Second)))
	if d := due.Sub(t.o.now()); d > 0 {
		timer := time.NewTimer(d)
		select {
		case <-timer.C:
		case <-ctx.Done():
			timer.Stop()
		}
	}
}

// progress logs one line: the periodic report (msg "progress") or the last
// one ("stopped").
func (t *Trainer) progress(now time.Time, msg string) {
	el := now.Sub(t.lastProg).Seconds()
	if msg == "stopped" {
		el = now.Sub(t.paceStart).Seconds() // the whole run's average
		t.lastProgEvents = t.startApplied
	}
	rate := 0.0
	if el > 0 {
		rate = float64(t.counts.Applied-t.lastProgEvents) / el
	}
	t.lastProg, t.lastProgEvents = now, t.counts.Applied
	if msg != "stopped" {
		t.lastRate = rate
	}
	st := t.mon.Status()
	fields := []zap.Field{
		zap.Uint64("events", t.counts.Applied),
		zap.Float64("events_per_s", rate),
		zap.Int("users", t.m.Live(Users)),
		zap.Int("items", t.m.Live(Items)),
	}
	if t.mode == Explicit {
		fields = append(fields, zap.Float64("rmse", st.RMSEFading), zap.Float64("mae", st.MAEFading),
			zap.Float64("rmse_window", st.RMSEWindow))
	} else {
		fields = append(fields, zap.Float64("recall", st.RecallFading), zap.Float64("recall_window", st.RecallWindow))
	}
	fields = append(fields,
		zap.Float64("cold_share", st.ColdEitherShare),
		zap.Uint64("drift_alarms", t.alarms),
		zap.Uint64("rejected", t.counts.Rejected),
		zap.Uint64("refused", t.counts.Refused),
		zap.Uint64("non_finite", t.counts.NonFinite),
		zap.Uint64("reapplied", t.counts.Reapplied),
		zap.Uint64("seq", t.seq),
		zap.Duration("stall_max", t.stallMax),
		zap.Stringer("position", t.pos),
	)
	if l, ok := t.src.(interface{ LagSummary() string }); ok {
		fields = append(fields, zap.String("lag", l.LagSummary()))
	}
	if t.o.ProgressFields != nil {
		fields = append(fields, t.o.ProgressFields()...)
	}
	t.stallMax = 0
	t.log.Info(msg, fields...)
}

// Counts returns the running totals (call after Run returns, or from the
// trainer goroutine).
func (t *Trainer) Counts() Counts { return t.counts }

// Position returns the position after the last batch applied.
func (t *Trainer) Position() stream.Position { return t.pos.Clone() }

func positionEqual(a, b stream.Position) bool {
	if a.Source != b.Source || a.Path != b.Path || a.Topic != b.Topic || a.Seed != b.Seed ||
		a.Offset != b.Offset || a.Line != b.Line || len(a.Partitions) != len(b.Partitions) {
		return false
	}
	for i := range a.Partitions {
		if a.Partitions[i] != b.Partitions[i] {
			return false
		}
	}
	return true
}
