package reader

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/redis/go-redis/v9"
)

// MetaFormat is the version of the metadata record's encoding.
const MetaFormat = 1

// Meta is a version's metadata record, stored as JSON at Layout.Meta(v). The
// writer rewrites it after every flush, so Position and the counts say which
// input the vectors of the version reflect.
type Meta struct {
	Format  int        `json:"format"`
	Version uint64     `json:"version"`
	Rank    int        `json:"rank"`
	Mode    string     `json:"mode"` // "explicit" or "implicit"
	Scale   [2]float64 `json:"scale"`
	Created time.Time  `json:"created"`
	Updated time.Time  `json:"updated"`
	// Buckets is the number of hash buckets per side; Hash names the bucket
	// function ("fnv1a64 mod buckets").
	Buckets  int      `json:"buckets"`
	Hash     string   `json:"hash"`
	Encoding Encoding `json:"encoding"`
	// GlobalMean is μ of the explicit model (0 in implicit mode).
	GlobalMean float64 `json:"global_mean"`
	// Users and Items count the vectors written to the version.
	Users   int64  `json:"users"`
	Items   int64  `json:"items"`
	Applied uint64 `json:"events_applied"`
	// Position is the source position (stream.Position JSON) the vectors reflect.
	Position json.RawMessage `json:"position,omitempty"`
	// Prequential is the model's prequential and drift state, as the trainer
	// marshalled it.
	Prequential json.RawMessage `json:"prequential,omitempty"`
	// Epoch is the writer's data-loss marker token when the version was made.
	Epoch string `json:"epoch"`
	// Model is the trainer's complete cut metadata (online.Meta JSON), from
	// which a daemon without a local checkpoint resumes.
	Model json.RawMessage `json:"model,omitempty"`
}

// HasBias reports whether vectors of the version carry a bias.
func (m *Meta) HasBias() bool { return m.Encoding.BiasAt >= 0 }

// Errors returned by the reader.
var (
	// ErrNoVersion means the pointer key is missing: nothing is published yet,
	// or Redis lost its data and the writer has not republished.
	ErrNoVersion = errors.New("reader: no current version published")
	// ErrUserNotFound means the user has no vector in the current version.
	ErrUserNotFound = errors.New("reader: user not found")
	// ErrVersionGone means the version vanished repeatedly during reads.
	ErrVersionGone = errors.New("reader: version retired while reading (retries exhausted)")
)

// Options configure a Reader. A zero field takes the default in its comment.
type Options struct {
	// Prefix is the namespace prefix. If empty, DefaultPrefix is used.
	Prefix string
	// Refresh is how long a resolved version is used before the pointer is
	// read again. If zero, 1 s.
	Refresh time.Duration
}

// Reader reads vectors of the current version. It is safe for concurrent use.
type Reader struct {
	c       redis.UniversalClient
	l       Layout
	refresh time.Duration

	mu  sync.Mutex
	cur *Meta
	at  time.Time
}

// New returns a Reader using client c, which the caller owns and closes.
func New(c redis.UniversalClient, o Options) (*Reader, error) {
	l, err := NewLayout(o.Prefix)
	if err != nil {
		return nil, err
	}
	if o.Refresh <= 0 {
		o.Refresh = time.Second
	}
	return &Reader{c: c, l: l, refresh: o.Refresh}, nil
}

// Layout returns the reader's key layout.
func (r *Reader) Layout() Layout { return r.l }

// Resolve reads the pointer and the current version's metadata now.
func (r *Reader) Resolve(ctx context.Context) (*Meta, error) {
	for range 3 {
		s, err := r.c.Get(ctx, r.l.Current()).Result()
		if errors.Is(err, redis.Nil) {
			return nil, ErrNoVersion
		}
		if err != nil {
			return nil, fmt.Errorf("reader: get %s: %w", r.l.Current(), err)
		}
		v, err := ParsePointer(s)
		if err != nil {
			return nil, err
		}
		raw, err := r.c.Get(ctx, r.l.Meta(v)).Bytes()
		if errors.Is(err, redis.Nil) {
			continue // flipped and retired between the two reads: read the pointer again
		}
		if err != nil {
			return nil, fmt.Errorf("reader: get %s: %w", r.l.Meta(v), err)
		}
		m := new(Meta)
		if err := json.Unmarshal(raw, m); err != nil {
			return nil, fmt.Errorf("reader: %s: bad metadata JSON: %w", r.l.Meta(v), err)
		}
		if err := m.check(v); err != nil {
			return nil, fmt.Errorf("reader: %s: %w", r.l.Meta(v), err)
		}
		r.mu.Lock()
		r.cur, r.at = m, time.Now()
		r.mu.Unlock()
		return m, nil
	}
	return nil, ErrVersionGone
}

// ParsePointer parses the value of the pointer key.
func ParsePointer(s string) (uint64, error) {
	v, err := strconv.ParseUint(strings.TrimSpace(s), 10, 64)
	if err != nil || v == 0 {
		return 0, fmt.Errorf("reader: pointer value %q is not a version number", s)
	}
	return v, nil
}

func (m *Meta) check(v uint64) error {
	switch {
	case m.Format != MetaFormat:
		return fmt.Errorf("field format: unsupported %d (want %d)", m.Format, MetaFormat)
	case m.Version != v:
		return fmt.Errorf("field version: %d, pointer says %d", m.Version, v)
	case m.Rank <= 0:
		return fmt.Errorf("field rank: %d", m.Rank)
	case m.Buckets <= 0:
		return fmt.Errorf("field buckets: %d", m.Buckets)
	case m.Encoding.Float != "float32le" || m.Encoding != EncodingFor(m.Rank, m.Encoding.BiasAt >= 0):
		return fmt.Errorf("field encoding: %+v does not match rank %d", m.Encoding, m.Rank)
	}
	return nil
}

func (r *Reader) version(ctx context.Context) (*Meta, error) {
	r.mu.Lock()
	m, at := r.cur, r.at
	r.mu.Unlock()
	if m != nil && time.Since(at) < r.refresh {
		return m, nil
	}
	return r.Resolve(ctx)
}

// Vector is one fetched vector. Factors is nil when the ID was not found.
type Vector struct {
	ID      string
	Factors []float32
	Bias    float32
	Trailer Trailer
}

// Found reports whether the vector exists in the version.
func (v *Vector) Found() bool { return v.Factors != nil }

// Result holds vectors read from one version in one pipeline.
type Result struct {
	Meta  *Meta
	Users []Vector
	Items []Vector
}

// Fetch reads the given users' and items' vectors from the current version in
// one pipeline of single-key HGETs (cluster-safe), ending with EXISTS of the
// version's meta key. If that key is gone the version was retired: the
// pointer is resolved again and the read repeated.
func (r *Reader) Fetch(ctx context.Context, users, items []string) (*Result, error) {
	m, err := r.version(ctx)
	if err != nil {
		return nil, err
	}
	for range 4 {
		res, gone, err := r.fetchFrom(ctx, m, users, items)
		if err != nil || !gone {
			return res, err
		}
		if m, err = r.Resolve(ctx); err != nil {
			return nil, err
		}
	}
	return nil, ErrVersionGone
}

func (r *Reader) fetchFrom(ctx context.Context, m *Meta, users, items []string) (*Result, bool, error) {
	p := r.c.Pipeline()
	cmds := make([]*redis.StringCmd, 0, len(users)+len(items))
	for _, id := range users {
		cmds = append(cmds, p.HGet(ctx, r.l.Bucket(m.Version, SideUser, BucketOf(id, m.Buckets)), id))
	}
	for _, id := range items {
		cmds = append(cmds, p.HGet(ctx, r.l.Bucket(m.Version, SideItem, BucketOf(id, m.Buckets)), id))
	}
	exists := p.Exists(ctx, r.l.Meta(m.Version))
	if _, err := p.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
		return nil, false, fmt.Errorf("reader: pipeline of %d reads: %w", len(cmds)+1, err)
	}
	if exists.Val() == 0 {
		return nil, true, nil
	}
	res := &Result{Meta: m, Users: make([]Vector, len(users)), Items: make([]Vector, len(items))}
	k := m.Rank
	backing := make([]float32, k*len(cmds))
	for i, c := range cmds {
		var v *Vector
		if i < len(users) {
			v = &res.Users[i]
			v.ID = users[i]
		} else {
			v = &res.Items[i-len(users)]
			v.ID = items[i-len(users)]
		}
		s, err := c.Result()
		if errors.Is(err, redis.Nil) {
			continue
		}
		if err != nil {
			return nil, false, fmt.Errorf("reader: hget %q: %w", v.ID, err)
		}
		vec := backing[i*k : (i+1)*k : (i+1)*k]
		if v.Bias, v.Trailer, err = m.Encoding.Decode(s, vec); err != nil {
			return nil, false, fmt.Errorf("reader: value of %q (%d bytes, want %d): %w", v.ID, len(s), m.Encoding.ValueLen, err)
		}
		v.Factors = vec
	}
	return res, false, nil
}

// Scored is a candidate with its predicted score.
type Scored struct {
	Item  string
	Score float64
}

// Ranking is the answer to TopN.
type Ranking struct {
	Version uint64
	Top     []Scored
	// Missing lists candidates with no vector in the version (not ranked).
	Missing []string
}

// Score returns the model's prediction for a user and item vector of version m.
//
// Explicit mode (biased MF; Koren, Bell, Volinsky, IEEE Computer 2009):
// r̂ = μ + b_u + b_i + p_u·q_i. Implicit mode: r̂ = p_u·q_i. The dot product is
// accumulated in float64.
func Score(m *Meta, u, it *Vector) float64 {
	var dot float64
	for j, x := range u.Factors {
		dot += float64(x) * float64(it.Factors[j])
	}
	if m.HasBias() {
		return m.GlobalMean + float64(u.Bias) + float64(it.Bias) + dot
	}
	return dot
}

// TopN scores every candidate for user with vectors read in one pipeline from
// one version, and returns the n best (exact over the candidates; ties broken
// by item ID), best first. n <= 0 means all.
func (r *Reader) TopN(ctx context.Context, user string, candidates []string, n int) (*Ranking, error) {
	res, err := r.Fetch(ctx, []string{user}, candidates)
	if err != nil {
		return nil, err
	}
	u := &res.Users[0]
	if !u.Found() {
		return nil, fmt.Errorf("%w: %q in version %d", ErrUserNotFound, user, res.Meta.Version)
	}
	rk := &Ranking{Version: res.Meta.Version, Top: make([]Scored, 0, len(candidates))}
	for i := range res.Items {
		it := &res.Items[i]
		if !it.Found() {
			rk.Missing = append(rk.Missing, it.ID)
			continue
		}
		rk.Top = append(rk.Top, Scored{Item: it.ID, Score: Score(res.Meta, u, it)})
	}
	slices.SortFunc(rk.Top, func(a, b Scored) int {
		switch {
		case a.Score > b.Score:
			return -1
		case a.Score < b.Score:
			return 1
		}
		return strings.Compare(a.Item, b.Item)
	})
	if n > 0 && len(rk.Top) > n {
		rk.Top = rk.Top[:n]
	}
	return rk, nil
}
