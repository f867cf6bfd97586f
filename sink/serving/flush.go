package serving

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strconv"
	"time"

	"github.com/redis/go-redis/v9"
	"go.uber.org/zap"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/serving/reader"
)

// flipScript moves the pointer to ARGV[2] if it holds ARGV[1] ("" = absent;
// "*" = anything, used when republishing after a data loss). It returns
// {1, previous} when it moved it, {2, previous} when the pointer already was
// ARGV[2] (a retry after a lost reply), {0, previous} when the pointer held
// something else. One key, so it is valid on a cluster.
var flipScript = redis.NewScript(`
local c = redis.call('GET', KEYS[1])
if c == ARGV[2] then return {2, c} end
if ARGV[1] == '*' or (c == false and ARGV[1] == '') or c == ARGV[1] then
  redis.call('SET', KEYS[1], ARGV[2])
  return {1, c or ''}
end
return {0, c or ''}
`)

type retiring struct {
	v        uint64
	deadline time.Time
}

// flusherState is owned by the flusher goroutine.
type flusherState struct {
	w        *Writer
	closeCtx context.Context

	started   bool   // first contact done
	token     string // our epoch marker
	setEpoch  bool   // the next pipeline writes the marker instead of checking it
	cur       uint64 // current version (0: none)
	curOK     bool   // cur uses our rank, mode and bucket count (we may write into it)
	curMade   time.Time
	building  uint64 // version being built (0: none yet)
	buildMade time.Time
	maxSeen   uint64
	retire    []retiring
	counts    map[uint64]*[2]int64

	// reused buffers
	enc    []byte
	order  []int32
	starts []int32
	args   []any
	meta   *online.Meta
}

var errLost = errors.New("serving: Redis lost its data (epoch marker missing or changed)")

func (f *flusherState) run() {
	w := f.w
	defer close(w.done)
	t := time.NewTicker(w.o.FlushInterval)
	defer t.Stop()
	backoff := time.Duration(0)
	for {
		select {
		case <-w.stop:
			f.drain()
			return
		case <-t.C:
		case <-w.kick:
		}
		if backoff > 0 {
			select {
			case <-w.stop:
				f.drain()
				return
			case <-time.After(backoff):
			}
		}
		if err := f.round(context.Background()); err != nil {
			if backoff == 0 {
				backoff = 100 * time.Millisecond
			} else if backoff *= 2; backoff > w.o.MaxBackoff {
				backoff = w.o.MaxBackoff
			}
		} else {
			backoff = 0
		}
	}
}

// drain flushes until nothing is pending or the Close context ends.
func (f *flusherState) drain() {
	ctx := f.closeCtx
	if ctx == nil {
		ctx = context.Background()
	}
	for {
		_ = f.round(ctx)
		w := f.w
		w.mu.Lock()
		left := (f.cur != 0 && f.curOK && !w.live.empty()) || w.sweep == sweepEnded
		w.mu.Unlock()
		if !left {
			return // nothing to write (a failed round only had the marker or retirement left)
		}
		select {
		case <-ctx.Done():
			return
		case <-time.After(100 * time.Millisecond):
		}
	}
}

// round is one flush attempt.
func (f *flusherState) round(parent context.Context) (err error) {
	w := f.w
	t0 := time.Now()
	w.smu.Lock()
	w.attempts++
	attempt := w.attempts
	w.smu.Unlock()
	defer func() { f.report(t0, attempt, err) }()

	if !f.started {
		if err := f.firstContact(parent); err != nil {
			return err
		}
	}

	// Take what is pending.
	w.mu.Lock()
	var out, outN *pending
	if f.cur != 0 && f.curOK && !w.live.empty() {
		out = w.live
		w.live = w.spare
		w.live.reset(out.k)
		w.spare = nil
	}
	ended := false
	if w.next != nil && !w.aborted && (w.sweep == sweepEnded || w.next.rows() >= w.o.RowsPerPipeline) {
		outN = w.next
		w.next = w.spareN
		if w.next == nil {
			w.next = newPending(outN.k)
		}
		w.next.reset(outN.k)
		w.spareN = nil
		ended = w.sweep == sweepEnded
	}
	gen := w.gen
	var meta *online.Meta
	if w.metaNew {
		meta, w.meta = w.meta, w.metaSpare
		copyMeta(w.meta, meta)
		w.metaSpare = nil
		w.metaNew = false
	}
	var fullMeta online.Meta
	if ended && w.fullMeta != nil {
		copyMeta(&fullMeta, w.fullMeta)
	}
	w.mu.Unlock()

	giveBack := func() {
		w.mu.Lock()
		if out != nil {
			w.live.mergeOlder(out)
			out.reset(0)
			w.spare = out
		}
		if outN != nil {
			if w.next != nil && !w.aborted {
				w.next.mergeOlder(outN)
			}
			outN.reset(0)
			w.spareN = outN
		}
		if meta != nil {
			if !w.metaNew {
				copyMeta(w.meta, meta)
				w.metaNew = true
			}
			w.metaSpare = meta
		}
		w.mu.Unlock()
	}
	recycle := func() {
		w.mu.Lock()
		if out != nil {
			out.reset(0)
			w.spare = out
		}
		if outN != nil {
			outN.reset(0)
			w.spareN = outN
		}
		if meta != nil {
			w.metaSpare = meta
		}
		w.mu.Unlock()
	}
	if meta != nil {
		if f.meta == nil {
			f.meta = new(online.Meta)
		}
		copyMeta(f.meta, meta)
	}

	if outN != nil && f.building == 0 {
		f.building = f.maxSeen + 1
		if f.cur >= f.building {
			f.building = f.cur + 1
		}
		f.maxSeen = f.building
		f.buildMade = time.Now()
		f.counts[f.building] = &[2]int64{}
	}

	// 1. Check (or set) the epoch marker, in its own round trip so that no
	// vector lands in a Redis that has just lost its data.
	if err := f.epoch(parent); err != nil {
		if errors.Is(err, errLost) {
			recycle()
			f.lost()
			return err
		}
		giveBack()
		return err
	}

	// 2. Rows and erasures.
	var written uint64
	if out != nil {
		n, err := f.write(parent, out, f.cur, true)
		written += n
		if err != nil {
			giveBack()
			return err
		}
	}
	if outN != nil {
		n, err := f.write(parent, outN, f.building, false)
		written += n
		if err != nil {
			giveBack()
			return err
		}
	}
	w.smu.Lock()
	w.st.VectorsWritten += written
	w.smu.Unlock()

	// 3. Metadata of the current version.
	if f.cur != 0 && f.curOK && f.meta != nil {
		if err := f.writeMeta(parent, f.cur, f.curMade, f.meta); err != nil {
			recycle()
			return err
		}
	}

	// 4. Finish a complete publish: its metadata, then the pointer flip.
	if ended {
		if err := f.writeMeta(parent, f.building, f.buildMade, &fullMeta); err != nil {
			f.reEnd(gen)
			recycle()
			return err
		}
		if err := f.flip(parent, gen); err != nil {
			if !errors.Is(err, errLost) {
				f.reEnd(gen)
			}
			recycle()
			return err
		}
	}
	recycle()

	// 5. Retire old versions whose grace period is over.
	return f.retireDue(parent)
}

// reEnd marks the sweep as ended again so the next round retries its finish.
func (f *flusherState) reEnd(gen uint64) {
	w := f.w
	w.mu.Lock()
	defer w.mu.Unlock()
	if w.gen != gen {
		return // a newer complete copy has started; it supersedes this one
	}
	if w.next == nil {
		w.next = newPending(0)
	}
	w.sweep = sweepEnded
}

func (f *flusherState) ctx(parent context.Context) (context.Context, context.CancelFunc) {
	return context.WithTimeout(parent, f.w.o.WriteTimeout)
}

// firstContact reads the pointer and decides whether to adopt it.
func (f *flusherState) firstContact(parent context.Context) error {
	w := f.w
	ctx, cancel := f.ctx(parent)
	defer cancel()
	s, err := w.c.Get(ctx, w.l.Current()).Result()
	if err != nil && !errors.Is(err, redis.Nil) {
		return fmt.Errorf("serving: get %s: %w", w.l.Current(), err)
	}
	if f.token, err = w.newToken(); err != nil {
		return err
	}
	f.setEpoch = true
	f.started = true
	if s == "" {
		w.want.Store(w.sweepIdle())
		return nil
	}
	v, err := reader.ParsePointer(s)
	if err != nil {
		return fmt.Errorf("serving: %s: %w", w.l.Current(), err)
	}
	f.cur, f.maxSeen = v, v
	raw, err := w.c.Get(ctx, w.l.Meta(v)).Bytes()
	var m reader.Meta
	if err == nil {
		err = json.Unmarshal(raw, &m)
	}
	if err != nil {
		w.log.Warn("serving: current version has no readable metadata; not writing into it", zap.Uint64("version", v), zap.Error(err))
		w.want.Store(w.sweepIdle())
		return nil
	}
	f.curMade = m.Created
	f.counts[v] = &[2]int64{m.Users, m.Items}
	f.curOK = m.Buckets == w.o.Buckets && m.Mode == w.o.Mode.String()
	if w.o.Adopt != v || !f.curOK {
		w.want.Store(w.sweepIdle())
	}
	return nil
}

func (w *Writer) sweepIdle() bool {
	w.mu.Lock()
	defer w.mu.Unlock()
	return w.sweep == sweepIdle
}

// epoch writes our marker (first contact, after a loss) or checks it.
func (f *flusherState) epoch(parent context.Context) error {
	w := f.w
	ctx, cancel := f.ctx(parent)
	defer cancel()
	if f.setEpoch {
		if err := w.c.Set(ctx, w.l.Epoch(), f.token, 0).Err(); err != nil {
			return fmt.Errorf("serving: set %s: %w", w.l.Epoch(), err)
		}
		f.setEpoch = false
		return nil
	}
	s, err := w.c.Get(ctx, w.l.Epoch()).Result()
	if errors.Is(err, redis.Nil) || (err == nil && s != f.token) {
		return errLost
	}
	if err != nil {
		return fmt.Errorf("serving: get %s: %w", w.l.Epoch(), err)
	}
	return nil
}

// lost handles a detected data loss: forget the current version, drop a
// complete publish in progress, and ask for a new one.
func (f *flusherState) lost() {
	w := f.w
	w.log.Warn("serving: Redis lost its data; republishing a complete version",
		zap.Uint64("version", f.cur), zap.Uint64("building", f.building))
	if f.cur != 0 {
		// Usually gone already; if only the marker changed, readers may
		// still use it, so it gets the grace period.
		f.retire = append(f.retire, retiring{v: f.cur, deadline: time.Now().Add(w.o.Grace)})
	}
	if f.building != 0 {
		f.retire = append(f.retire, retiring{v: f.building}) // never visible: at once
	}
	f.cur, f.curOK, f.building = 0, false, 0
	if tok, err := w.newToken(); err == nil {
		f.token = tok
	}
	f.setEpoch = true
	w.mu.Lock()
	switch w.sweep {
	case sweepActive:
		w.aborted = true // dropped at EndFull, then WantFull
	case sweepEnded:
		w.dropSweepLocked()
		w.want.Store(true)
	default:
		w.want.Store(true)
	}
	w.mu.Unlock()
	w.smu.Lock()
	w.st.DataLosses++
	w.st.Version, w.st.Building = 0, 0
	w.smu.Unlock()
	f.notify()
}

// write sends p's rows (HSET, grouped by bucket, at most FieldsPerCommand
// fields per command and RowsPerPipeline rows per pipeline) and erasures
// (HDEL) to version v; with alsoRetiring, erasures go to the retiring versions
// too. Every command is idempotent, so go-redis may safely re-send a pipeline.
// It returns the number of vectors acknowledged.
func (f *flusherState) write(parent context.Context, p *pending, v uint64, alsoRetiring bool) (uint64, error) {
	w := f.w
	B := w.o.Buckets
	enc := reader.EncodingFor(p.k, w.o.Mode == online.Explicit)
	// Counting sort of the live rows by (side, bucket).
	if cap(f.starts) < 2*B+1 {
		f.starts = make([]int32, 2*B+1)
	}
	starts := f.starts[:2*B+1]
	clear(starts)
	f.order = f.order[:0]
	for i := range p.recs {
		r := &p.recs[i]
		if r.dead {
			f.order = append(f.order, -1)
			continue
		}
		b := int(r.side)*B + reader.BucketOfBytes(p.id(r.idOff, r.idLen), B)
		f.order = append(f.order, int32(b))
		starts[b+1]++
	}
	for b := 1; b <= 2*B; b++ {
		starts[b] += starts[b-1]
	}
	sorted := make([]int32, starts[2*B])
	fill := append([]int32(nil), starts[:2*B]...)
	for i, b := range f.order {
		if b >= 0 {
			sorted[fill[b]] = int32(i)
			fill[b]++
		}
	}
	// Values are encoded into one buffer sized up front.
	need := len(sorted) * enc.ValueLen
	if cap(f.enc) < need {
		f.enc = make([]byte, 0, need+need/4)
	}
	f.enc = f.enc[:0]

	pipe := w.c.Pipeline()
	var cmds []*redis.IntCmd
	var acked uint64
	inPipe := 0
	batch := make([]int32, 0, min(len(sorted), w.o.RowsPerPipeline+w.o.FieldsPerCommand))
	exec := func() error {
		if err := f.execCounted(parent, pipe, cmds, v, inPipe); err != nil {
			return err
		}
		now := time.Now().UnixNano()
		w.smu.Lock()
		for _, i := range batch {
			w.hist[histIndex(now-p.recs[i].since)]++
		}
		w.smu.Unlock()
		acked += uint64(len(batch))
		batch, cmds, inPipe = batch[:0], cmds[:0], 0
		return nil
	}
	for sb := 0; sb < 2*B; sb++ {
		lo, hi := int(starts[sb]), int(starts[sb+1])
		if lo == hi {
			continue
		}
		side := reader.SideUser
		if sb >= B {
			side = reader.SideItem
		}
		key := w.l.Bucket(v, side, sb%B)
		for lo < hi {
			n := min(hi-lo, w.o.FieldsPerCommand)
			args := make([]any, 0, 2*n)
			for _, i := range sorted[lo : lo+n] {
				r := &p.recs[i]
				s := len(f.enc)
				f.enc = enc.Encode(f.enc, p.vec(r), r.bias, reader.Trailer{Row: r.row, Count: r.count, Last: r.last, Epoch: r.epoch})
				args = append(args, p.id(r.idOff, r.idLen), f.enc[s:len(f.enc):len(f.enc)])
				batch = append(batch, i)
			}
			cmds = append(cmds, pipe.HSet(parent, key, args...))
			lo += n
			inPipe += n
			if inPipe >= w.o.RowsPerPipeline {
				if err := exec(); err != nil {
					return acked, err
				}
			}
		}
	}
	// Erasures after the writes, so an erasure always wins.
	targets := []uint64{v}
	if alsoRetiring {
		for _, r := range f.retire {
			targets = append(targets, r.v)
		}
	}
	var dels []*redis.IntCmd
	for _, d := range p.dels {
		id := p.id(d.idOff, d.idLen)
		side := reader.SideUser
		if d.side == online.Items {
			side = reader.SideItem
		}
		for _, tv := range targets {
			dels = append(dels, pipe.HDel(parent, w.l.Bucket(tv, side, reader.BucketOfBytes(id, B)), string(id)))
		}
		inPipe++
	}
	if inPipe > 0 {
		if err := exec(); err != nil {
			return acked, err
		}
		// An erasure that removed a field lowers that version's count.
		for i, d := range p.dels {
			for j, tv := range targets {
				if dels[i*len(targets)+j].Val() > 0 {
					if c := f.counts[tv]; c != nil {
						c[d.side&1]--
					}
				}
			}
		}
	}
	return acked, nil
}

// execCounted runs the pipeline and adds the new fields each HSET created to
// the version's vector counts.
func (f *flusherState) execCounted(parent context.Context, pipe redis.Pipeliner, cmds []*redis.IntCmd, v uint64, n int) error {
	ctx, cancel := f.ctx(parent)
	defer cancel()
	if _, err := pipe.Exec(ctx); err != nil {
		return fmt.Errorf("serving: pipeline of %d rows and erasures to version %d: %w", n, v, err)
	}
	c := f.counts[v]
	for _, cmd := range cmds {
		if c != nil {
			key := cmd.Args()[1].(string)
			if isItemKey(key) {
				c[1] += cmd.Val()
			} else {
				c[0] += cmd.Val()
			}
		}
	}
	return nil
}

// isItemKey reports whether a bucket key is on the item side ("…/i/B").
func isItemKey(key string) bool {
	for i := len(key) - 1; i >= 2; i-- {
		if key[i] == '/' {
			return key[i-1] == 'i' && key[i-2] == '/'
		}
	}
	return false
}

// writeMeta writes version v's metadata record from m.
func (f *flusherState) writeMeta(parent context.Context, v uint64, made time.Time, m *online.Meta) error {
	w := f.w
	rank := m.Rank
	if rank == 0 {
		w.mu.Lock()
		rank = w.live.k
		w.mu.Unlock()
	}
	model, err := json.Marshal(m)
	if err != nil {
		return fmt.Errorf("serving: metadata of version %d: %w", v, err)
	}
	pos, _ := json.Marshal(m.Position)
	rec := reader.Meta{
		Format: reader.MetaFormat, Version: v, Rank: rank, Mode: w.o.Mode.String(), Scale: w.o.Scale,
		Created: made.UTC(), Updated: time.Now().UTC(), Buckets: w.o.Buckets, Hash: "fnv1a64 mod buckets",
		Encoding: reader.EncodingFor(rank, w.o.Mode == online.Explicit),
		Applied:  m.Counts.Applied, Position: pos, Prequential: m.Monitor, Epoch: f.token, Model: model,
	}
	if m.Model.MeanN > 0 && w.o.Mode == online.Explicit {
		rec.GlobalMean = (m.Model.MeanSum + m.Model.MeanComp) / m.Model.MeanN
	}
	if c := f.counts[v]; c != nil {
		rec.Users, rec.Items = c[0], c[1]
	}
	raw, err := json.Marshal(&rec)
	if err != nil {
		return fmt.Errorf("serving: metadata of version %d: %w", v, err)
	}
	ctx, cancel := f.ctx(parent)
	defer cancel()
	if err := w.c.Set(ctx, w.l.Meta(v), raw, 0).Err(); err != nil {
		return fmt.Errorf("serving: set %s: %w", w.l.Meta(v), err)
	}
	return nil
}

// flip moves the pointer to the version just built and schedules the old one
// for retirement.
func (f *flusherState) flip(parent context.Context, gen uint64) error {
	w := f.w
	ctx, cancel := f.ctx(parent)
	defer cancel()
	old := "*" // after a loss, or at first start: take the pointer over
	if f.cur != 0 {
		old = strconv.FormatUint(f.cur, 10)
	}
	nv := strconv.FormatUint(f.building, 10)
	reply, err := flipScript.Run(ctx, w.c, []string{w.l.Current()}, old, nv).Slice()
	if err != nil {
		return fmt.Errorf("serving: flip %s to %s: %w", w.l.Current(), nv, err)
	}
	var res int64
	var prev string
	if len(reply) == 2 {
		res, _ = reply[0].(int64)
		prev, _ = reply[1].(string)
	}
	if f.cur == 0 && res == 1 && prev != "" {
		// A version we did not know as current (someone else's marker):
		// retire it after the grace period.
		if pv, err := reader.ParsePointer(prev); err == nil && pv != f.building {
			f.retire = append(f.retire, retiring{v: pv, deadline: time.Now().Add(w.o.Grace)})
			f.expire(parent, pv)
		}
	}
	if res == 0 {
		// The pointer is not what we left: another writer, or Redis lost
		// the data (the marker check catches that next round).
		f.lost()
		return fmt.Errorf("serving: flip %s to %s: pointer changed under us: %w", w.l.Current(), nv, errLost)
	}
	if f.cur != 0 {
		f.retire = append(f.retire, retiring{v: f.cur, deadline: time.Now().Add(w.o.Grace)})
		f.expire(parent, f.cur)
	}
	w.log.Info("serving: version published", zap.Uint64("version", f.building), zap.Uint64("previous", f.cur))
	f.cur, f.curOK, f.curMade, f.building = f.building, true, f.buildMade, 0
	w.mu.Lock()
	// Rows offered during the publish are in the live table too: drop the
	// building table, unless a newer complete copy has begun meanwhile.
	if w.gen == gen {
		if w.next != nil {
			w.next.reset(0)
			w.spareN, w.next = w.next, nil
		}
		w.sweep = sweepIdle
	}
	w.mu.Unlock()
	w.smu.Lock()
	w.st.Versions++
	w.st.Version = f.cur
	w.smu.Unlock()
	f.notify()
	return nil
}

// expire sets a backstop expiry on version v's keys in case this process
// dies before retiring it: the meta key at the grace period, the buckets a
// little later (meta first: see the reader's consistency rule).
func (f *flusherState) expire(parent context.Context, v uint64) {
	w := f.w
	ctx, cancel := f.ctx(parent)
	defer cancel()
	p := w.c.Pipeline()
	p.PExpire(ctx, w.l.Meta(v), w.o.Grace+time.Second)
	for b := 0; b < w.o.Buckets; b++ {
		p.PExpire(ctx, w.l.Bucket(v, reader.SideUser, b), w.o.Grace+3*time.Second)
		p.PExpire(ctx, w.l.Bucket(v, reader.SideItem, b), w.o.Grace+3*time.Second)
	}
	if _, err := p.Exec(ctx); err != nil {
		w.log.Warn("serving: backstop expiry of old version failed", zap.Uint64("version", v), zap.Error(err))
	}
}

// retireDue UNLINKs versions whose grace period is over: meta key first, then
// the buckets, in one ordered pipeline.
func (f *flusherState) retireDue(parent context.Context) error {
	w := f.w
	now := time.Now()
	keep := f.retire[:0]
	var err error
	for _, r := range f.retire {
		if err != nil || now.Before(r.deadline) {
			keep = append(keep, r)
			continue
		}
		ctx, cancel := f.ctx(parent)
		p := w.c.Pipeline()
		p.Unlink(ctx, w.l.Meta(r.v))
		for b := 0; b < w.o.Buckets; b++ {
			p.Unlink(ctx, w.l.Bucket(r.v, reader.SideUser, b))
			p.Unlink(ctx, w.l.Bucket(r.v, reader.SideItem, b))
		}
		_, e := p.Exec(ctx)
		cancel()
		if e != nil {
			err = fmt.Errorf("serving: unlink version %d: %w", r.v, e)
			keep = append(keep, r)
			continue
		}
		delete(f.counts, r.v)
	}
	f.retire = keep
	return err
}

// report records the outcome of a round in Status.
func (f *flusherState) report(t0 time.Time, attempt uint64, err error) {
	w := f.w
	d := time.Since(t0)
	w.smu.Lock()
	was := w.st.Degraded
	if err != nil {
		w.st.Degraded = true
		w.st.LastError = err.Error()
		w.st.LastErrorAt = time.Now()
		w.st.FailedFlushes++
	} else {
		w.okAttempt = attempt
		w.st.Degraded = false
		w.st.Flushes++
		w.st.LastFlush = time.Now()
		w.st.LastFlushDuration = d
		w.st.MaxFlushDuration = max(w.st.MaxFlushDuration, d)
	}
	w.st.Version, w.st.Building = f.cur, f.building
	now := w.st.Degraded
	w.smu.Unlock()
	if was != now {
		if now {
			w.log.Warn("serving: degraded: flush failed", zap.Error(err))
		} else {
			w.log.Info("serving: recovered")
		}
		f.notify()
	}
}

func (f *flusherState) notify() {
	if f.w.o.OnChange != nil {
		f.w.o.OnChange(f.w.Status())
	}
}

// Freshness histogram: 1 ms buckets up to 60 s.
const histBuckets = 60_001

func histIndex(ns int64) int {
	ms := ns / int64(time.Millisecond)
	if ms < 0 {
		ms = 0
	}
	if ms >= histBuckets {
		ms = histBuckets - 1
	}
	return int(ms)
}

func quantile(h *[histBuckets]uint64, q float64) time.Duration {
	var n uint64
	for _, c := range h {
		n += c
	}
	if n == 0 {
		return 0
	}
	target := uint64(q*float64(n-1)) + 1
	var s uint64
	for i, c := range h {
		s += c
		if s >= target {
			return time.Duration(i+1) * time.Millisecond // upper edge of the bucket
		}
	}
	return time.Duration(histBuckets) * time.Millisecond
}
