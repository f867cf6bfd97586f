package serving

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"

	"github.com/redis/go-redis/v9"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/serving/reader"
)

// ErrChanged is returned by Restorer.Rows when the version's metadata or the
// pointer changed while the rows were read (a writer is still active): the
// rows would not match the positions.
var ErrChanged = errors.New("serving: restore: the serving copy changed while it was read")

// Restorer reads the current version back from Redis, for a daemon that
// starts without a local checkpoint.
type Restorer struct {
	c    redis.UniversalClient
	own  bool
	l    reader.Layout
	o    Options
	raw  []byte
	vecs []float32

	// Version is the version read; pass it as Options.Adopt to the writer.
	Version uint64
	// Record is the version's metadata record.
	Record reader.Meta
	// Meta is the trainer's cut metadata stored with the version: resume the
	// source from Meta.Position.
	Meta *online.Meta
}

// OpenRestore resolves the current version and reads its metadata. It returns
// reader.ErrNoVersion when nothing is published. Options.Mode may be zero.
func OpenRestore(ctx context.Context, o Options) (*Restorer, error) {
	if o.Client == nil && len(o.Addrs) == 0 {
		return nil, errors.New("serving: restore: options: addrs: at least one Redis address is required")
	}
	if o.Mode == 0 {
		o.Mode = online.Explicit // only to pass validation; the record decides
	}
	if err := o.fill(); err != nil {
		return nil, err
	}
	l, err := reader.NewLayout(o.Prefix)
	if err != nil {
		return nil, fmt.Errorf("serving: restore: options: prefix: %w", err)
	}
	c, own := o.client()
	r := &Restorer{c: c, own: own, l: l, o: o}
	if err := r.readMeta(ctx); err != nil {
		r.Close()
		return nil, err
	}
	return r, nil
}

func (r *Restorer) readMeta(ctx context.Context) error {
	s, err := r.c.Get(ctx, r.l.Current()).Result()
	if errors.Is(err, redis.Nil) {
		return reader.ErrNoVersion
	}
	if err != nil {
		return fmt.Errorf("serving: restore: get %s: %w", r.l.Current(), err)
	}
	v, err := reader.ParsePointer(s)
	if err != nil {
		return fmt.Errorf("serving: restore: %s: %w", r.l.Current(), err)
	}
	raw, err := r.c.Get(ctx, r.l.Meta(v)).Bytes()
	if err != nil {
		return fmt.Errorf("serving: restore: get %s: %w", r.l.Meta(v), err)
	}
	var rec reader.Meta
	if err := json.Unmarshal(raw, &rec); err != nil {
		return fmt.Errorf("serving: restore: %s: bad JSON: %w", r.l.Meta(v), err)
	}
	if rec.Version != v || rec.Rank <= 0 || rec.Buckets <= 0 || rec.Encoding != reader.EncodingFor(rec.Rank, rec.HasBias()) {
		return fmt.Errorf("serving: restore: %s: fields version/rank/buckets/encoding inconsistent (version %d, rank %d, buckets %d)",
			r.l.Meta(v), rec.Version, rec.Rank, rec.Buckets)
	}
	m := new(online.Meta)
	if err := json.Unmarshal(rec.Model, m); err != nil {
		return fmt.Errorf("serving: restore: %s: field model: %w", r.l.Meta(v), err)
	}
	r.Version, r.Record, r.Meta, r.raw = v, rec, m, raw
	return nil
}

// Rows calls each for every vector of the version, users first, in bucket
// order (not row order). rec and its slices are valid only during the call.
// After the last row it checks that neither the pointer nor the metadata
// changed meanwhile (else ErrChanged).
func (r *Restorer) Rows(ctx context.Context, each func(rec *online.RowRecord) error) error {
	rec := &r.Record
	k := rec.Rank
	if cap(r.vecs) < k {
		r.vecs = make([]float32, k)
	}
	vec := r.vecs[:k]
	const group = 16
	for si, side := range []string{reader.SideUser, reader.SideItem} {
		for b0 := 0; b0 < rec.Buckets; b0 += group {
			p := r.c.Pipeline()
			var cmds []*redis.MapStringStringCmd
			for b := b0; b < min(b0+group, rec.Buckets); b++ {
				cmds = append(cmds, p.HGetAll(ctx, r.l.Bucket(r.Version, side, b)))
			}
			if _, err := p.Exec(ctx); err != nil {
				return fmt.Errorf("serving: restore: read buckets %d..%d of side %s: %w", b0, b0+len(cmds)-1, side, err)
			}
			for ci, c := range cmds {
				for id, val := range c.Val() {
					bias, t, err := rec.Encoding.Decode(val, vec)
					if err != nil {
						return fmt.Errorf("serving: restore: %s field %q: %d bytes, want %d: %w",
							r.l.Bucket(r.Version, side, b0+ci), id, len(val), rec.Encoding.ValueLen, err)
					}
					rr := online.RowRecord{Side: online.Side(si), Row: t.Row, ID: []byte(id), Bias: bias,
						Count: t.Count, Last: t.Last, Epoch: t.Epoch, Vec: vec}
					if err := each(&rr); err != nil {
						return err
					}
				}
			}
		}
	}
	before := r.raw
	ver := r.Version
	if err := r.readMeta(ctx); err != nil {
		return fmt.Errorf("%w: %w", ErrChanged, err)
	}
	if r.Version != ver || !sameCut(before, r.raw) {
		return ErrChanged
	}
	return nil
}

// sameCut reports whether two metadata records describe the same cut (they
// may differ in their "updated" time only).
func sameCut(a, b []byte) bool {
	var x, y reader.Meta
	if json.Unmarshal(a, &x) != nil || json.Unmarshal(b, &y) != nil {
		return false
	}
	return string(x.Model) == string(y.Model) && x.Users == y.Users && x.Items == y.Items
}

// Close closes the client Restore built.
func (r *Restorer) Close() error {
	if r.own {
		return r.c.Close()
	}
	return nil
}
