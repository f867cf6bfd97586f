package kafka

import (
	"context"
	"errors"
	"fmt"
	"iter"
	"time"

	kgo "github.com/segmentio/kafka-go"
)

// Record is one message for Produce: Key places it (murmur2, as the Java
// client does, so other clients agree on the partition); Value is the payload.
type Record struct {
	Key   []byte
	Value []byte
}

// ProduceOptions configures Produce.
type ProduceOptions struct {
	Brokers  []string
	Topic    string
	Security Security
	// Rate is the target records per second (0: as fast as the broker takes
	// them). It is held by a token bucket holding at most one chunk.
	Rate float64
	// Max bounds the records written (0: until the iterator ends).
	Max int64
	// MaxDuration bounds the time spent (0: no bound).
	MaxDuration time.Duration
	// Chunk is the records per synchronous write (default 1000).
	Chunk int
	// Acks is the acknowledgement asked for (default: all in-sync replicas).
	Acks kgo.RequiredAcks
}

// ProduceStats counts what Produce wrote.
type ProduceStats struct {
	Records int64
	Bytes   int64 // key and value bytes
	Elapsed time.Duration
}

// Produce writes records to o.Topic at o.Rate until the iterator ends, o.Max
// records are written, o.MaxDuration passes or ctx ends (the last two are not
// errors). The counts are of acknowledged writes; a write in flight when ctx
// ends may land uncounted. Records are copied, so the iterator may reuse its
// buffers.
func Produce(ctx context.Context, o ProduceOptions, records iter.Seq[Record]) (ProduceStats, error) {
	var st ProduceStats
	if len(o.Brokers) == 0 || o.Topic == "" {
		return st, errors.New("kafka: produce: brokers and topic are required")
	}
	if o.Rate < 0 || o.Max < 0 || o.MaxDuration < 0 || o.Chunk < 0 {
		return st, errors.New("kafka: produce: rate, max, max duration and chunk must not be negative")
	}
	if o.Chunk == 0 {
		o.Chunk = 1000
	}
	if o.Acks == 0 {
		o.Acks = kgo.RequireAll
	}
	tr := o.Security.transport()
	defer tr.CloseIdleConnections()
	w := &kgo.Writer{
		Addr:         kgo.TCP(o.Brokers...),
		Topic:        o.Topic,
		Balancer:     &kgo.Murmur2Balancer{},
		RequiredAcks: o.Acks,
		BatchSize:    o.Chunk,
		BatchBytes:   16 << 20,
		BatchTimeout: 5 * time.Millisecond,
		Transport:    tr,
		Compression:  0,
	}
	defer w.Close()

	start := time.Now()
	// MaxDuration is checked between writes, never by cutting one off: a
	// write cancelled in flight may still land, and the counts would lie.
	var deadline time.Time
	if o.MaxDuration > 0 {
		deadline = start.Add(o.MaxDuration)
	}
	timeUp := false
	chunk := make([]kgo.Message, 0, o.Chunk)
	arena := make([]byte, 0, 64<<10)
	var werr error
	flush := func() bool {
		if len(chunk) == 0 {
			return true
		}
		due := time.Now()
		if o.Rate > 0 {
			// Token bucket holding one chunk: by time t after the start,
			// rate·t tokens have accrued; wait until the chunk fits.
			due = start.Add(time.Duration(float64(st.Records+int64(len(chunk))-int64(o.Chunk)) / o.Rate * float64(time.Second)))
		}
		if !deadline.IsZero() && !due.Before(deadline) {
			timeUp = true
			return false
		}
		if d := time.Until(due); d > 0 && !sleep(ctx, d) {
			return false
		}
		if err := w.WriteMessages(ctx, chunk...); err != nil {
			if ctx.Err() == nil {
				werr = fmt.Errorf("kafka: produce to %q after %d records: %w", o.Topic, st.Records, err)
			}
			return false
		}
		for _, m := range chunk {
			st.Bytes += int64(len(m.Key) + len(m.Value))
		}
		st.Records += int64(len(chunk))
		chunk, arena = chunk[:0], arena[:0]
		return true
	}
	for r := range records {
		if ctx.Err() != nil || (o.Max > 0 && st.Records+int64(len(chunk)) >= o.Max) {
			break
		}
		if cap(arena)-len(arena) < len(r.Key)+len(r.Value) {
			arena = make([]byte, 0, max(2*cap(arena), len(r.Key)+len(r.Value)))
		}
		var key []byte
		if r.Key != nil {
			arena = append(arena, r.Key...)
			key = arena[len(arena)-len(r.Key):]
		}
		arena = append(arena, r.Value...)
		val := arena[len(arena)-len(r.Value):]
		chunk = append(chunk, kgo.Message{Key: key, Value: val})
		if len(chunk) == o.Chunk && !flush() {
			break
		}
	}
	if werr == nil && ctx.Err() == nil && !timeUp {
		flush()
	}
	st.Elapsed = time.Since(start)
	return st, werr
}
