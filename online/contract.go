package online

import (
	"encoding/json"
	"errors"
	"fmt"

	"freshet.dev/freshet/stream"
)

// Side names one of the two factor tables.
type Side uint8

const (
	// Users is the row side: users, listeners, readers, followers.
	Users Side = 0
	// Items is the column side: items, shows, articles, followed accounts.
	Items Side = 1
)

// String returns "user" or "item".
func (s Side) String() string {
	if s == Users {
		return "user"
	}
	return "item"
}

// Mode selects what an event's value means and which loss SGD descends.
type Mode uint8

const (
	// Explicit events carry ratings on a bounded scale; the model is biased MF.
	Explicit Mode = iota + 1
	// Implicit events are positive-only signals (plays, follows, clicks).
	Implicit
)

// String returns "explicit" or "implicit".
func (m Mode) String() string {
	switch m {
	case Explicit:
		return "explicit"
	case Implicit:
		return "implicit"
	}
	return fmt.Sprintf("mode(%d)", int(m))
}

// Consumer names a downstream reader of changed rows. Each consumer has its own
// dirty marks: a row changed once is copied once to each consumer that tracks
// changes, however often it changed in between.
type Consumer uint8

const (
	// ConsumerLog is the checkpoint's incremental log.
	ConsumerLog Consumer = 0
	// ConsumerPublish is the serving copy (Redis).
	ConsumerPublish Consumer = 1
	numConsumers             = 2
)

// Errors returned by the model.
var (
	// ErrFull is returned by Intern when a side has reached its row cap.
	ErrFull = errors.New("online: row cap reached")
	// ErrErased is returned by Intern for an ID that was erased: it can never
	// come back, whatever is replayed.
	ErrErased = errors.New("online: id was erased")
)

// NonFiniteError reports an SGD step whose result was not finite. Both rows were
// restored to their values before the step; the event is counted and skipped.
type NonFiniteError struct {
	User, Item int32
}

func (e *NonFiniteError) Error() string {
	return fmt.Sprintf("online: non-finite step for user row %d, item row %d (rows restored)", e.User, e.Item)
}

// RowRecord is a copy of one row of a factor table with its metadata, taken at
// a batch boundary. ID and Vec point into the RowSet that holds the record.
type RowRecord struct {
	Side  Side
	Row   int32
	ID    []byte
	Bias  float32
	Count uint32 // number of SGD updates the row has had
	Last  int64  // event time (ms) of the last update
	Epoch uint32 // latent basis epoch the row is expressed in
	// Vec holds the k factors; nil when Deleted.
	Vec []float32
	// Deleted marks a freed row (erasure). ID is the erased ID.
	Deleted bool
}

// RowSet is a reusable batch of row copies handed to a checkpoint or serving
// writer. Its owner is whoever holds it: after handing a RowSet on, the trainer
// does not touch it again.
type RowSet struct {
	Rank int
	Recs []RowRecord
	vecs []float32
	ids  []byte
}

// Reset empties rs and sets its rank, keeping its buffers.
func (rs *RowSet) Reset(rank int) {
	rs.Rank = rank
	rs.Recs = rs.Recs[:0]
	rs.vecs = rs.vecs[:0]
	rs.ids = rs.ids[:0]
}

// Len returns the number of records.
func (rs *RowSet) Len() int { return len(rs.Recs) }

// Append copies rec (its ID and Vec too) into rs.
func (rs *RowSet) Append(rec RowRecord) {
	if len(rec.ID) > 0 {
		if cap(rs.ids)-len(rs.ids) < len(rec.ID) {
			rs.ids = make([]byte, 0, 2*cap(rs.ids)+len(rec.ID)+1024)
		}
		s := len(rs.ids)
		rs.ids = append(rs.ids, rec.ID...)
		rec.ID = rs.ids[s:len(rs.ids):len(rs.ids)]
	}
	if rec.Vec != nil {
		if cap(rs.vecs)-len(rs.vecs) < len(rec.Vec) {
			rs.vecs = make([]float32, 0, 2*cap(rs.vecs)+len(rec.Vec)+1024)
		}
		s := len(rs.vecs)
		rs.vecs = append(rs.vecs, rec.Vec...)
		rec.Vec = rs.vecs[s:len(rs.vecs):len(rs.vecs)]
	}
	rs.Recs = append(rs.Recs, rec)
}

// Counts are the running totals of a model's input.
type Counts struct {
	Applied   uint64 `json:"applied"`    // events learned from
	Rejected  uint64 `json:"rejected"`   // records set aside by the source
	NonFinite uint64 `json:"non_finite"` // steps undone by the numerical guard
	Erased    uint64 `json:"erased"`     // erasure events applied
	Refused   uint64 `json:"refused"`    // events for erased IDs or over the row caps
	// Reapplied counts events applied a second time after crashes: applied
	// before a crash but after the last durable cut, so delivered and
	// applied again on restart (at-least-once). Applied counts them once.
	Reapplied uint64 `json:"reapplied"`
}

// ModelMeta is the non-row state of a Model needed to resume it exactly.
type ModelMeta struct {
	// MeanSum, MeanComp and MeanN hold the compensated running sum of ratings
	// (Neumaier) and their count: μ = (MeanSum + MeanComp) / MeanN.
	MeanSum  float64 `json:"mean_sum"`
	MeanComp float64 `json:"mean_comp"`
	MeanN    float64 `json:"mean_n"`
	// Next is the high-water row count per side; Free lists freed rows.
	Next [2]int32   `json:"next"`
	Free [2][]int32 `json:"free,omitempty"`
	// Tombstones are hex digests of erased IDs (side-prefixed), never the IDs.
	Tombstones []string `json:"tombstones,omitempty"`
	// RNG is the marshalled state of the sampler's generator (implicit mode).
	RNG []byte `json:"rng,omitempty"`
	// Recent is the reservoir of recent positive item rows that negative
	// sampling draws from (popularity-proportional).
	Recent []int32 `json:"recent,omitempty"`
}

// MetaFormat is the version of Meta's encoding.
const MetaFormat = 1

// Meta is the small, non-row part of a durable cut: with the rows, it is
// everything needed to resume exactly where the cut was taken.
type Meta struct {
	Format int    `json:"format"`
	Rank   int    `json:"rank"`
	Mode   string `json:"mode"`
	// Seq numbers the cuts (flushes) of this model, from 1.
	Seq uint64 `json:"seq"`
	// Position is where the source resumes after this cut.
	Position stream.Position `json:"position"`
	// Time is model time: the event time (ms) of the newest event applied.
	Time   int64     `json:"time"`
	Counts Counts    `json:"counts"`
	Model  ModelMeta `json:"model"`
	// Monitor is the prequential and drift-detector state (Monitor.MarshalState).
	Monitor json.RawMessage `json:"monitor,omitempty"`
	// Purge is set from an erasure until the snapshot that completes it is
	// committed: a daemon that resumes from a cut with Purge set takes that
	// snapshot (and deletes older checkpoint files) again, so a crash in
	// between cannot leave erased rows behind in retained files.
	Purge bool `json:"purge,omitempty"`
}

// Clone returns a deep copy of m.
func (m *Meta) Clone() *Meta {
	c := *m
	c.Position = m.Position.Clone()
	c.Model.Free[0] = append([]int32(nil), m.Model.Free[0]...)
	c.Model.Free[1] = append([]int32(nil), m.Model.Free[1]...)
	c.Model.Tombstones = append([]string(nil), m.Model.Tombstones...)
	c.Model.RNG = append([]byte(nil), m.Model.RNG...)
	c.Model.Recent = append([]int32(nil), m.Model.Recent...)
	c.Monitor = append(json.RawMessage(nil), m.Monitor...)
	return &c
}

// A Checkpointer makes cuts of the model durable. It is called from one
// goroutine (the trainer's writer), in the order the trainer took the cuts.
//
// The trainer's protocol, which recovery relies on:
//
//  1. Append(rows, meta) writes the rows changed since the previous Append (and
//     any Deleted records) with the meta of the same batch boundary, and
//     returns only once they are durable (fsync). Only then is meta.Position
//     acknowledged to the source.
//  2. BeginSnapshot(meta) starts a full snapshot and rotates the log: Appends
//     after it belong to the new snapshot. The trainer then hands every live
//     row, chunk by chunk, to WriteRows, each chunk copied at some batch
//     boundary (so the rows are "fuzzy": of different moments).
//  3. After the last chunk the trainer makes one more Append, then calls
//     Commit(meta) with that Append's meta. The snapshot is now complete:
//     its rows plus every log record appended since BeginSnapshot give the
//     exact state at meta. Commit writes atomically (temporary file, fsync,
//     rename, directory fsync) and then drops older snapshots and logs.
//
// Recovery loads the newest complete snapshot, applies the logs appended since
// its BeginSnapshot in order (dropping a torn last record), and resumes from the
// last record's meta. Later row records overwrite earlier ones.
type Checkpointer interface {
	Append(rows *RowSet, meta *Meta) error
	BeginSnapshot(meta *Meta) error
	WriteRows(rows *RowSet) error
	Commit(meta *Meta) error
}

// A Publisher receives copies of changed rows for the serving copy (Redis).
// Its methods are called from the trainer goroutine at batch boundaries and
// must not block on the network: the publisher queues, coalesces and writes in
// its own goroutine. It takes ownership of each RowSet handed to it.
type Publisher interface {
	// Offer hands over the rows changed since the previous Offer and the meta
	// at the same batch boundary.
	Offer(rows *RowSet, meta *Meta)
	// WantFull reports whether the publisher needs a complete copy of the model
	// (first publish, or after the serving copy lost its data). The trainer
	// then hands every live row to OfferFull, chunk by chunk across batch
	// boundaries, and ends with EndFull. Rows changed meanwhile keep arriving
	// through Offer.
	WantFull() bool
	OfferFull(rows *RowSet)
	EndFull(meta *Meta)
}
