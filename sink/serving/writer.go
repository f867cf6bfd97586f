// Package serving publishes freshet's factor vectors to Redis for ranking
// services: Writer implements online.Publisher, coalescing changed rows and
// flushing them on an interval, publishing whole model versions atomically,
// detecting that Redis lost its data, and erasing IDs from every live version.
// Restore reads the current version back for a daemon with no local
// checkpoint. The key layout and value encoding are defined (and documented
// as a contract) in package reader, which ranking services import; see
// the README ("Serving from Redis").
//
// # Threading
//
// Offer, OfferFull, EndFull and WantFull are called from the trainer goroutine
// and never touch the network: they copy rows into a coalescing table under a
// mutex held only for the copy. One flusher goroutine owns every Redis call.
package serving

import (
	"context"
	"crypto/rand"
	"crypto/tls"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"sync"
	"sync/atomic"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/redis/go-redis/v9/maintnotifications"
	"go.uber.org/zap"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/serving/reader"
)

// Defaults for Options.
const (
	DefaultBuckets          = 1024
	DefaultFlushInterval    = time.Second
	DefaultFlushRows        = 100_000
	DefaultGrace            = 30 * time.Second
	DefaultWriteTimeout     = 10 * time.Second
	DefaultFieldsPerCommand = 1000
	DefaultRowsPerPipeline  = 20_000
	DefaultMaxBackoff       = 5 * time.Second
)

// Options configure a Writer (and Restore). A zero field takes the default
// named in its comment.
type Options struct {
	// Addrs are the Redis addresses (host:port). One address: a standalone
	// server. Required unless Client is set.
	Addrs []string
	// DB is the database number (standalone only).
	DB int
	// Username and Password authenticate (Redis ACL). Never logged.
	Username, Password string
	// TLS, when non-nil, is the client TLS configuration built by the caller
	// (CA pool, client certificate).
	TLS *tls.Config
	// Client, when non-nil, is used instead of building one from the fields
	// above; the caller owns and closes it.
	Client redis.UniversalClient

	// Prefix is the key namespace. If empty, reader.DefaultPrefix.
	Prefix string
	// Mode is the model's mode; it decides whether values carry a bias.
	// Required.
	Mode online.Mode
	// Scale is the rating scale [min, max] recorded in the metadata (explicit).
	Scale [2]float64
	// Buckets is the number of hashes per side in a new version. If zero,
	// DefaultBuckets.
	Buckets int
	// FlushInterval is the time between flushes. If zero, DefaultFlushInterval.
	FlushInterval time.Duration
	// FlushRows starts a flush early once this many rows are pending. If zero,
	// DefaultFlushRows.
	FlushRows int
	// Grace is how long an old version stays readable after the pointer moved
	// off it. If zero, DefaultGrace.
	Grace time.Duration
	// WriteTimeout bounds one pipeline round trip. If zero, DefaultWriteTimeout.
	WriteTimeout time.Duration
	// FieldsPerCommand caps the fields of one HSET. If zero,
	// DefaultFieldsPerCommand.
	FieldsPerCommand int
	// RowsPerPipeline caps the rows sent in one pipeline. If zero,
	// DefaultRowsPerPipeline.
	RowsPerPipeline int
	// MaxBackoff caps the wait between failed flushes. If zero,
	// DefaultMaxBackoff.
	MaxBackoff time.Duration
	// Adopt is the version to keep writing into at start (the one Restore read
	// the model from). Zero: publish a new complete version at start
	// (WantFull is true until the trainer streams the model).
	Adopt uint64
	// Logger receives a few structured lines (degraded, recovered, version
	// published, data loss). If nil, nothing is logged.
	Logger *zap.Logger
	// OnChange, when set, is called from the flusher goroutine after a change
	// of Degraded, a version flip or a detected data loss. It must not block.
	OnChange func(Status)
	// Token is the source of the random epoch tokens. If nil, crypto/rand.
	Token io.Reader
}

func (o *Options) fill() error {
	if o.Client == nil && len(o.Addrs) == 0 {
		return errors.New("serving: options: addrs: at least one Redis address is required")
	}
	if o.Mode != online.Explicit && o.Mode != online.Implicit {
		return fmt.Errorf("serving: options: mode: must be explicit or implicit, got %v", o.Mode)
	}
	if o.Buckets < 0 || o.FlushRows < 0 || o.FieldsPerCommand < 0 || o.RowsPerPipeline < 0 {
		return errors.New("serving: options: buckets, flush_rows, fields_per_command, rows_per_pipeline must not be negative")
	}
	if o.FlushInterval < 0 || o.Grace < 0 || o.WriteTimeout < 0 || o.MaxBackoff < 0 {
		return errors.New("serving: options: durations must not be negative")
	}
	def := func(p *int, d int) {
		if *p == 0 {
			*p = d
		}
	}
	defd := func(p *time.Duration, d time.Duration) {
		if *p == 0 {
			*p = d
		}
	}
	def(&o.Buckets, DefaultBuckets)
	def(&o.FlushRows, DefaultFlushRows)
	def(&o.FieldsPerCommand, DefaultFieldsPerCommand)
	def(&o.RowsPerPipeline, DefaultRowsPerPipeline)
	defd(&o.FlushInterval, DefaultFlushInterval)
	defd(&o.Grace, DefaultGrace)
	defd(&o.WriteTimeout, DefaultWriteTimeout)
	defd(&o.MaxBackoff, DefaultMaxBackoff)
	if o.Token == nil {
		o.Token = rand.Reader
	}
	if o.Logger == nil {
		o.Logger = zap.NewNop()
	}
	return nil
}

// client builds the go-redis client for o (or returns o.Client).
func (o *Options) client() (redis.UniversalClient, bool) {
	if o.Client != nil {
		return o.Client, false
	}
	return redis.NewUniversalClient(&redis.UniversalOptions{
		Addrs:                 o.Addrs,
		DB:                    o.DB,
		Username:              o.Username,
		Password:              o.Password,
		TLSConfig:             o.TLS,
		ReadTimeout:           o.WriteTimeout,
		WriteTimeout:          o.WriteTimeout,
		ContextTimeoutEnabled: true,
		DisableIdentity:       true,
		MaintNotificationsConfig: &maintnotifications.Config{
			Mode: maintnotifications.ModeDisabled,
		},
	}), true
}

// Status is a snapshot of the writer's state, for health checks and metrics.
type Status struct {
	// Degraded is true while the last flush failed.
	Degraded  bool
	LastError string
	// LastErrorAt is when LastError happened.
	LastErrorAt time.Time
	// Pending counts rows waiting to be written (current and building version).
	Pending int
	// LastFlush is when the last successful flush ended.
	LastFlush time.Time
	// Version is the current published version (0: none); Building is the
	// version being written by a complete publish (0: none).
	Version, Building uint64
	WantFull          bool
	// VectorsWritten counts vector values acknowledged by Redis.
	VectorsWritten uint64
	Flushes        uint64
	FailedFlushes  uint64
	Versions       uint64 // versions published by this writer
	DataLosses     uint64 // times Redis was found to have lost its data
	// LastFlushDuration and MaxFlushDuration time the successful flushes.
	LastFlushDuration, MaxFlushDuration time.Duration
	// FreshP50 and FreshP99 are quantiles of the time from a row's first
	// Offer after its previous write to Redis acknowledging the new write,
	// over all rows written so far (1 ms resolution).
	FreshP50, FreshP99 time.Duration
}

type sweepState uint8

const (
	sweepIdle sweepState = iota
	sweepActive
	sweepEnded
)

// Writer publishes vectors to Redis. Create it with New; stop it with Close.
type Writer struct {
	o     Options
	l     reader.Layout
	c     redis.UniversalClient
	ownC  bool
	log   *zap.Logger
	kick  chan struct{}
	stop  chan struct{}
	done  chan struct{}
	close sync.Once

	mu        sync.Mutex
	live      *pending // rows for the current version
	next      *pending // rows for the version being built; nil when none
	sweep     sweepState
	aborted   bool   // the sweep in progress cannot be completed (data loss)
	gen       uint64 // numbers the complete copies (sweeps)
	meta      *online.Meta
	metaSpare *online.Meta
	metaNew   bool
	fullMeta  *online.Meta // EndFull's meta
	want      atomic.Bool
	spare     *pending
	spareN    *pending

	// flusher goroutine only
	f flusherState

	smu       sync.Mutex
	st        Status
	hist      [histBuckets]uint64
	attempts  uint64 // flush rounds started
	okAttempt uint64 // number of the last round that succeeded
}

// New validates o, builds the client and starts the flusher goroutine. It does
// not contact Redis: connection problems show in Status and are retried.
func New(o Options) (*Writer, error) {
	if err := o.fill(); err != nil {
		return nil, err
	}
	l, err := reader.NewLayout(o.Prefix)
	if err != nil {
		return nil, fmt.Errorf("serving: options: prefix: %w", err)
	}
	c, own := o.client()
	w := &Writer{o: o, l: l, c: c, ownC: own, log: o.Logger,
		kick: make(chan struct{}, 1), stop: make(chan struct{}), done: make(chan struct{}),
		live: newPending(0), spare: newPending(0), spareN: newPending(0),
		meta: new(online.Meta), metaSpare: new(online.Meta)}
	w.f.w = w
	w.f.counts = map[uint64]*[2]int64{}
	w.want.Store(o.Adopt == 0)
	go w.f.run()
	return w, nil
}

// Offer queues rows (coalesced by side and row, the newest copy kept) and the
// meta of the same batch boundary. It copies both and never blocks on Redis;
// rows and meta stay the caller's. Steady-state Offer does not allocate.
func (w *Writer) Offer(rows *online.RowSet, meta *online.Meta) {
	now := time.Now().UnixNano()
	w.mu.Lock()
	w.putLocked(w.live, rows, now)
	if w.next != nil && !w.aborted {
		w.putLocked(w.next, rows, now)
	}
	if meta != nil {
		copyMeta(w.meta, meta)
		w.metaNew = true
	}
	n := w.live.rows()
	w.mu.Unlock()
	if n >= w.o.FlushRows {
		w.poke()
	}
}

func (w *Writer) putLocked(p *pending, rows *online.RowSet, now int64) {
	if rows == nil {
		return
	}
	if p.k != rows.Rank {
		if p.empty() {
			p.k = rows.Rank
		} else {
			w.log.Error("serving: rank changed with rows pending; rows of the new rank dropped",
				zap.Int("pending_rank", p.k), zap.Int("rank", rows.Rank))
			return
		}
	}
	for i := range rows.Recs {
		p.put(&rows.Recs[i], now)
	}
}

func (w *Writer) poke() {
	select {
	case w.kick <- struct{}{}:
	default:
	}
}

// WantFull reports whether the writer needs a complete copy of the model: at
// first start (unless Adopt), after Redis lost its data, or after
// RequestFull. It is never true while a complete copy is being streamed; a
// copy that cannot be completed is dropped at EndFull and WantFull turns true
// again.
func (w *Writer) WantFull() bool { return w.want.Load() }

// RequestFull asks for a complete copy (for example after an SVD refresh
// that changed every row).
func (w *Writer) RequestFull() {
	w.mu.Lock()
	if w.sweep == sweepIdle {
		w.want.Store(true)
	}
	w.mu.Unlock()
}

// OfferFull queues one chunk of a complete copy. The first chunk after
// WantFull (or any chunk when no copy is in progress) starts a new version.
func (w *Writer) OfferFull(rows *online.RowSet) {
	now := time.Now().UnixNano()
	w.mu.Lock()
	if w.sweep != sweepActive {
		w.beginSweepLocked()
	}
	if !w.aborted {
		w.putLocked(w.next, rows, now)
	}
	n := w.next.rows()
	w.mu.Unlock()
	if n >= w.o.RowsPerPipeline {
		w.poke()
	}
}

func (w *Writer) beginSweepLocked() {
	if w.next == nil {
		w.next = w.spareN
		w.spareN = nil
		if w.next == nil {
			w.next = newPending(0)
		}
	}
	w.next.reset(0)
	w.gen++
	w.sweep = sweepActive
	w.aborted = false
	w.want.Store(false)
}

// EndFull ends a complete copy with the meta at its last batch boundary. The
// flusher writes what is left, the metadata, and then flips the pointer.
func (w *Writer) EndFull(meta *online.Meta) {
	w.mu.Lock()
	if w.sweep != sweepActive {
		w.beginSweepLocked() // an empty model: publish an empty version
	}
	if w.aborted {
		w.dropSweepLocked()
		w.want.Store(true)
	} else {
		w.sweep = sweepEnded
		if w.fullMeta == nil {
			w.fullMeta = new(online.Meta)
		}
		if meta != nil {
			copyMeta(w.fullMeta, meta)
			copyMeta(w.meta, meta)
			w.metaNew = true
		}
	}
	w.mu.Unlock()
	w.poke()
}

func (w *Writer) dropSweepLocked() {
	if w.next != nil {
		w.next.reset(0)
		w.spareN, w.next = w.next, nil
	}
	w.sweep = sweepIdle
	w.aborted = false
}

// Status returns a snapshot of the writer's state.
func (w *Writer) Status() Status {
	w.mu.Lock()
	pend := w.live.rows()
	if w.next != nil {
		pend += w.next.rows()
	}
	w.mu.Unlock()
	w.smu.Lock()
	s := w.st
	s.FreshP50 = quantile(&w.hist, 0.50)
	s.FreshP99 = quantile(&w.hist, 0.99)
	w.smu.Unlock()
	s.Pending = pend
	s.WantFull = w.want.Load()
	return s
}

// Flush asks for a flush round now and waits until a round that started
// after the call has succeeded, or ctx ends. Rows offered before the call are
// then in Redis, except while no version is published (they wait for the
// complete copy).
func (w *Writer) Flush(ctx context.Context) error {
	w.smu.Lock()
	target := w.attempts + 1
	w.smu.Unlock()
	w.poke()
	t := time.NewTicker(2 * time.Millisecond)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return fmt.Errorf("serving: flush: %w (last error: %s)", ctx.Err(), w.Status().LastError)
		case <-w.done:
			return errors.New("serving: flush: writer closed")
		case <-t.C:
		}
		w.smu.Lock()
		ok := w.okAttempt >= target
		started := w.attempts >= target
		w.smu.Unlock()
		if ok {
			return nil
		}
		if !started {
			w.poke()
		}
	}
}

// Close writes what is pending (until ctx ends), stops the flusher and closes
// the client it built. It is safe to call more than once.
func (w *Writer) Close(ctx context.Context) error {
	var err error
	w.close.Do(func() {
		w.f.closeCtx = ctx
		close(w.stop)
		<-w.done
		if s := w.Status(); s.Pending > 0 {
			err = fmt.Errorf("serving: close: %d rows not written (last error: %s)", s.Pending, s.LastError)
		}
		if w.ownC {
			if cerr := w.c.Close(); cerr != nil && err == nil {
				err = cerr
			}
		}
	})
	return err
}

// newToken returns a random hex token.
func (w *Writer) newToken() (string, error) {
	var b [16]byte
	if _, err := io.ReadFull(w.o.Token, b[:]); err != nil {
		return "", fmt.Errorf("serving: epoch token: %w", err)
	}
	return hex.EncodeToString(b[:]), nil
}

// copyMeta copies src into dst, reusing dst's slices.
func copyMeta(dst, src *online.Meta) {
	d := *dst
	*dst = *src
	dst.Position.Partitions = append(d.Position.Partitions[:0], src.Position.Partitions...)
	dst.Model.Free[0] = append(d.Model.Free[0][:0], src.Model.Free[0]...)
	dst.Model.Free[1] = append(d.Model.Free[1][:0], src.Model.Free[1]...)
	dst.Model.Tombstones = append(d.Model.Tombstones[:0], src.Model.Tombstones...)
	dst.Model.RNG = append(d.Model.RNG[:0], src.Model.RNG...)
	dst.Model.Recent = append(d.Model.Recent[:0], src.Model.Recent...)
	dst.Monitor = append(d.Monitor[:0], src.Monitor...)
}
