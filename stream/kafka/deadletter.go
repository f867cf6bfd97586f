package kafka

import (
	"context"
	"errors"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	kgo "github.com/segmentio/kafka-go"
	"go.uber.org/zap"

	"freshet.dev/freshet/stream"
)

// Header keys of a dead-letter record. Its value is the original record value;
// its key is the source partition in decimal, so the dead letters of one source
// partition stay in order on one dead-letter partition.
const (
	HeaderField           = "reject-field"            // wire field at fault ("" when unparseable)
	HeaderError           = "reject-error"            // the decode error, in full
	HeaderSourceTopic     = "reject-source-topic"     // topic the record came from
	HeaderSourcePartition = "reject-source-partition" // decimal
	HeaderSourceOffset    = "reject-source-offset"    // decimal
)

// ErrDeadLetterClosed is returned by Reject after Close.
var ErrDeadLetterClosed = errors.New("kafka: dead-letter writer closed")

// DeadLetter is a stream.Rejecter that writes bad records to a dead-letter
// topic off the caller's path: Reject queues the record (blocking only when
// the bounded queue is full) and one goroutine writes queued records in
// batches with acknowledgement from all in-sync replicas, retrying until the
// write succeeds or Close gives up. Until its write is acknowledged a record's
// offset is held: the source never commits past it.
type DeadLetter struct {
	w           *kgo.Writer
	transport   *kgo.Transport
	sourceTopic string
	q           chan kgo.Message
	held        *pending
	log         *zap.Logger

	written atomic.Int64 // acknowledged records
	failed  atomic.Int64 // failed write attempts

	closing   chan struct{}
	closeOnce sync.Once
	wg        sync.WaitGroup

	cancelMu sync.Mutex
	cancel   context.CancelFunc
	stopped  bool
}

// NewDeadLetter starts a dead-letter writer to topic for records of
// sourceTopic. queue bounds the records waiting to be written (0: default).
func NewDeadLetter(brokers []string, topic, sourceTopic string, sec Security, queue int, log *zap.Logger) *DeadLetter {
	if queue <= 0 {
		queue = DefaultDeadLetterQueue
	}
	if log == nil {
		log = zap.NewNop()
	}
	tr := sec.transport()
	d := &DeadLetter{
		w: &kgo.Writer{
			Addr:         kgo.TCP(brokers...),
			Topic:        topic,
			Balancer:     &kgo.Murmur2Balancer{},
			RequiredAcks: kgo.RequireAll,
			BatchTimeout: 5 * time.Millisecond,
			BatchSize:    512,
			MaxAttempts:  3,
			WriteTimeout: 10 * time.Second,
			ReadTimeout:  10 * time.Second,
			Transport:    tr,
		},
		transport:   tr,
		sourceTopic: sourceTopic,
		q:           make(chan kgo.Message, queue),
		held:        newPending(),
		log:         log,
		closing:     make(chan struct{}),
	}
	d.wg.Add(1)
	go d.run()
	return d
}

// Reject queues r for the dead-letter topic. It copies r.Raw.
func (d *DeadLetter) Reject(r stream.Rejected) error {
	field, reason := "", ""
	if r.Err != nil {
		field, reason = r.Err.Field, r.Err.Error()
	}
	part := strconv.FormatInt(int64(r.Partition), 10)
	m := kgo.Message{
		Key:   []byte(part),
		Value: append([]byte(nil), r.Raw...),
		Headers: []kgo.Header{
			{Key: HeaderField, Value: []byte(field)},
			{Key: HeaderError, Value: []byte(reason)},
			{Key: HeaderSourceTopic, Value: []byte(d.sourceTopic)},
			{Key: HeaderSourcePartition, Value: []byte(part)},
			{Key: HeaderSourceOffset, Value: strconv.AppendInt(nil, r.Offset, 10)},
		},
		// Partition and Offset are ignored by the Writer; they carry the
		// source location to the acknowledgement.
		Partition: int(r.Partition),
		Offset:    r.Offset,
	}
	d.held.add(r.Partition, r.Offset)
	select {
	case <-d.closing:
		return ErrDeadLetterClosed
	default:
	}
	select {
	case d.q <- m:
		return nil
	case <-d.closing:
		return ErrDeadLetterClosed
	}
}

// Written returns the number of dead-letter records acknowledged.
func (d *DeadLetter) Written() int64 { return d.written.Load() }

// Failed returns the number of failed write attempts (each is retried).
func (d *DeadLetter) Failed() int64 { return d.failed.Load() }

// Waiting returns the number of records queued or being written.
func (d *DeadLetter) Waiting() int { return d.held.count() }

// Held returns the lowest dead-lettered offset of source partition p whose
// write is not yet acknowledged.
func (d *DeadLetter) Held(p int32) (int64, bool) { return d.held.lowest(p) }

// Close writes what is queued, giving up after timeout, and stops the writer.
// Records not written stay held: their offsets are never committed.
func (d *DeadLetter) Close(timeout time.Duration) error {
	var err error
	d.closeOnce.Do(func() {
		close(d.closing)
		done := make(chan struct{})
		go func() { d.wg.Wait(); close(done) }()
		select {
		case <-done:
		case <-time.After(timeout):
			err = errors.New("kafka: dead-letter writer: gave up flushing on close")
			d.log.Warn("dead-letter records left unwritten", zap.Int("waiting", d.held.count()))
		}
		d.stop()
		<-done
		if cerr := d.w.Close(); cerr != nil && err == nil {
			err = cerr
		}
		d.transport.CloseIdleConnections()
	})
	return err
}

// stop cancels a write in progress (set by run).
func (d *DeadLetter) stop() {
	d.cancelMu.Lock()
	if d.cancel != nil {
		d.cancel()
	}
	d.stopped = true
	d.cancelMu.Unlock()
}

func (d *DeadLetter) run() {
	defer d.wg.Done()
	ctx, cancel := context.WithCancel(context.Background())
	d.cancelMu.Lock()
	d.cancel = cancel
	if d.stopped {
		cancel()
	}
	d.cancelMu.Unlock()
	defer cancel()

	batch := make([]kgo.Message, 0, 512)
	for {
		batch = batch[:0]
		select {
		case m := <-d.q:
			batch = append(batch, m)
		case <-d.closing:
			// Drain what is queued, then stop.
			select {
			case m := <-d.q:
				batch = append(batch, m)
			default:
				return
			}
		}
	fill:
		for len(batch) < cap(batch) {
			select {
			case m := <-d.q:
				batch = append(batch, m)
			default:
				break fill
			}
		}
		if !d.write(ctx, batch) {
			return
		}
	}
}

// write writes batch until it is acknowledged, backing off between attempts.
// It returns false when ctx ends first.
func (d *DeadLetter) write(ctx context.Context, batch []kgo.Message) bool {
	backoff := 100 * time.Millisecond
	for {
		// The Writer overwrites Partition (and, on success, Offset); keep the
		// source location aside.
		src := make([][2]int64, len(batch))
		for i := range batch {
			src[i] = [2]int64{int64(batch[i].Partition), batch[i].Offset}
		}
		err := d.w.WriteMessages(ctx, batch...)
		if err == nil {
			for _, s := range src {
				d.held.ack(int32(s[0]), s[1])
			}
			d.written.Add(int64(len(batch)))
			return true
		}
		for i := range batch {
			batch[i].Partition, batch[i].Offset = int(src[i][0]), src[i][1]
		}
		d.failed.Add(1)
		d.log.Warn("dead-letter write failed; retrying", zap.Int("records", len(batch)), zap.Error(err))
		select {
		case <-ctx.Done():
			return false
		case <-time.After(backoff):
		}
		backoff = min(2*backoff, 5*time.Second)
	}
}
