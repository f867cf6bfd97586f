// Package stream defines freshet's interaction events, where they come from and
// how a reader resumes: the Event and Batch types, the Source interface with its
// delivery contract, the record decoders (JSON lines and delimited text), the
// file replay source, the built-in demo scenario, and the rejects file where bad
// records are set aside.
//
// Data flows one way: stream -> online -> sink. This package imports nothing
// from the rest of freshet.
package stream

import (
	"context"
	"errors"
	"fmt"
	"strconv"
)

// Kind says what an event asks of the model.
type Kind uint8

const (
	// Interaction is a rating (explicit mode) or a positive signal such as a
	// play, a follow or a click (implicit mode).
	Interaction Kind = iota
	// EraseUser asks that the user named by Event.User be removed everywhere
	// (privacy erasure). Item and Value are ignored.
	EraseUser
	// EraseItem asks that the item named by Event.Item be removed everywhere.
	EraseItem
)

// String returns the wire name of the kind.
func (k Kind) String() string {
	switch k {
	case Interaction:
		return "interaction"
	case EraseUser:
		return "erase_user"
	case EraseItem:
		return "erase_item"
	}
	return "kind(" + strconv.Itoa(int(k)) + ")"
}

// MaxIDLen is the longest user, item or event ID accepted, in bytes.
const MaxIDLen = 256

// Event is one interaction. User, Item and EventID point into the arena of the
// Batch that holds the event: they are valid only as long as that batch is, and
// must be copied to be kept.
type Event struct {
	User    []byte
	Item    []byte
	EventID []byte // optional; empty when the producer gave none
	// Value is the rating (explicit) or the weight (implicit; 1 when absent).
	Value float64
	// Time is the event time in milliseconds since the Unix epoch. Model time
	// comes from here, never from the wall clock.
	Time int64
	Kind Kind
	// Partition and Offset locate the record in its source (Kafka partition and
	// offset; for a file, partition 0 and the byte offset of the line).
	Partition int32
	Offset    int64
}

// Batch is a bounded group of events handed from a source to the trainer, with
// the byte arena that backs the events' IDs. A Batch is reused: Reset keeps the
// capacity and forgets the events.
type Batch struct {
	Events []Event
	arena  []byte
	// Pos is the position after the last record the batch covers (accepted or
	// rejected): resuming from Pos never re-reads a record of this batch.
	Pos Position
	// Rejected counts the records this batch covers that were set aside.
	Rejected int
}

// Reset empties b, keeping its buffers.
func (b *Batch) Reset() {
	b.Events = b.Events[:0]
	b.arena = b.arena[:0]
	b.Rejected = 0
}

// Len returns the number of events in b.
func (b *Batch) Len() int { return len(b.Events) }

// Add appends ev to b, copying its ID bytes into b's arena, and returns a
// pointer to the stored event. Add allocates only when the arena or the event
// slice must grow.
func (b *Batch) Add(ev Event) *Event {
	ev.User = b.keep(ev.User)
	ev.Item = b.keep(ev.Item)
	ev.EventID = b.keep(ev.EventID)
	b.Events = append(b.Events, ev)
	return &b.Events[len(b.Events)-1]
}

// keep copies p into the arena. When the arena must grow, earlier events keep
// pointing at the old backing array, which stays valid (it is never written
// again until Reset).
func (b *Batch) keep(p []byte) []byte {
	if len(p) == 0 {
		return nil
	}
	if cap(b.arena)-len(b.arena) < len(p) {
		n := 2*cap(b.arena) + len(p)
		if n < 4096 {
			n = 4096
		}
		b.arena = make([]byte, 0, n)
	}
	start := len(b.arena)
	b.arena = append(b.arena, p...)
	return b.arena[start:len(b.arena):len(b.arena)]
}

// PartitionOffset is the next offset to read in one partition.
type PartitionOffset struct {
	Partition int32 `json:"partition"`
	Next      int64 `json:"next"`
}

// Position says where a source resumes: the next record it would read. It is
// recorded in every checkpoint and in the serving metadata, so it is plain data.
type Position struct {
	// Source is "scenario", "file" or "kafka".
	Source string `json:"source"`
	// Path is the file replayed (file sources).
	Path string `json:"path,omitempty"`
	// Topic is the Kafka topic (Kafka sources).
	Topic string `json:"topic,omitempty"`
	// Seed is the scenario seed (scenario sources).
	Seed uint64 `json:"seed,omitempty"`
	// Offset is the byte offset of the next line (file) or the index of the
	// next event (scenario).
	Offset int64 `json:"offset,omitempty"`
	// Line is the number of the next line, counted from 1 (file).
	Line int64 `json:"line,omitempty"`
	// Partitions holds the next offset per partition (Kafka), sorted by partition.
	Partitions []PartitionOffset `json:"partitions,omitempty"`
}

// Clone returns a deep copy of p.
func (p Position) Clone() Position {
	if p.Partitions != nil {
		p.Partitions = append([]PartitionOffset(nil), p.Partitions...)
	}
	return p
}

// IsZero reports whether p is the zero Position (a model that has read nothing).
func (p Position) IsZero() bool {
	return p.Source == "" && p.Path == "" && p.Topic == "" && p.Seed == 0 &&
		p.Offset == 0 && p.Line == 0 && len(p.Partitions) == 0
}

// String formats p for logs.
func (p Position) String() string {
	switch p.Source {
	case "file":
		return fmt.Sprintf("file %s line %d offset %d", p.Path, p.Line, p.Offset)
	case "scenario":
		return fmt.Sprintf("scenario seed %d event %d", p.Seed, p.Offset)
	case "kafka":
		s := "kafka " + p.Topic
		for _, po := range p.Partitions {
			s += fmt.Sprintf(" %d:%d", po.Partition, po.Next)
		}
		return s
	}
	return "start"
}

// A Source yields interaction events in batches, in per-partition order.
//
// Next blocks until a batch is ready, ctx is done, or the source ends. The
// returned batch is owned by the source and stays valid until the next call to
// Next or Close; the caller must not keep its ID slices. A batch holds at most
// the source's configured batch size (a few hundred events) and may be empty
// (an idle source returns an empty batch at least once per second, so that the
// caller can flush on time). A finite source (a replay file, a generated
// scenario of fixed length) returns io.EOF after its last batch. When ctx is
// done Next returns ctx.Err().
//
// Commit records that every record up to p (exclusive: p is the next record to
// read) has been applied and that the state including it is durable. Delivery
// is at-least-once: after a crash the source is reopened at the position of the
// newest durable checkpoint, and records after it are delivered again. Commit
// is never called with a position beyond the last batch returned.
//
// Next and Commit are called from one goroutine (the trainer); a Source need
// not be safe for concurrent use. Close stops any goroutine the source started
// and waits for it; it is safe to call more than once.
type Source interface {
	Next(ctx context.Context) (*Batch, error)
	Commit(ctx context.Context, p Position) error
	Close() error
}

// A Decoder decodes one record (a line of a file, or a Kafka message value)
// and appends the event to b. On bad input it returns a *DecodeError naming the
// field, leaves b unchanged, and the caller sets the record aside. A Decoder
// never panics on any input. A Decoder is not safe for concurrent use.
type Decoder interface {
	Decode(rec []byte, b *Batch) error
}

// ErrBadRecord is matched by every *DecodeError (errors.Is).
var ErrBadRecord = errors.New("stream: bad record")

// DecodeError reports a record that could not be decoded or failed
// validation. The record is counted, set aside with this reason, and skipped;
// it never stops the stream.
type DecodeError struct {
	// Where locates the record: "line 17" of a file, or "partition 2 offset 9041".
	Where string
	// Field is the wire field at fault ("" when the record is not parseable at
	// all, for example not JSON).
	Field string
	// Reason says what is wrong, in lower case.
	Reason string
}

func (e *DecodeError) Error() string {
	s := "stream: "
	if e.Where != "" {
		s += e.Where + ": "
	}
	if e.Field != "" {
		s += "field " + strconv.Quote(e.Field) + ": "
	}
	return s + e.Reason
}

// Is makes errors.Is(err, ErrBadRecord) true for every DecodeError.
func (e *DecodeError) Is(target error) bool { return target == ErrBadRecord }

// Rejected is a record set aside, with its original bytes and the reason.
type Rejected struct {
	Raw       []byte
	Err       *DecodeError
	Partition int32
	Offset    int64
	Line      int64 // file sources; 0 otherwise
}

// A Rejecter sets bad records aside (the rejects file, or a dead-letter
// topic). Reject must copy Raw if it keeps it. Reject is called from the
// source's goroutine only.
type Rejecter interface {
	Reject(r Rejected) error
}
