package online

import (
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"

	"freshet.dev/freshet/stream"
)

// Defaults for zero Options fields.
const (
	DefaultRank          = 32
	DefaultLearnRate     = 0.01
	DefaultBiasLearnRate = 0.01
	DefaultReg           = 0.02
	DefaultBiasReg       = 0.02
	DefaultMinValue      = 1.0
	DefaultMaxValue      = 5.0
	DefaultInitStd       = 0.1
	DefaultDecayFloor    = 0.1
)

// Limits checked by New and ApplyRecord.
const (
	// MaxRank is the largest rank k accepted.
	MaxRank = 1024
	// MaxNegatives is the most sampled negatives per positive.
	MaxNegatives = 64
	// RecentSize bounds the reservoir of recent positive item rows that
	// negatives are drawn from.
	RecentSize = 4096
	// MaxRowGap is how far past the high-water mark a recovered record may
	// lie; a record further out is refused as corrupt rather than growing the
	// tables without bound.
	MaxRowGap = 1 << 22
)

// Options configure a Model. A zero field takes the default named in its
// comment; Options() returns the filled-in values.
type Options struct {
	// Rank is the number of latent factors k, in [1, MaxRank]. Default 32.
	Rank int
	// Mode is Explicit (ratings) or Implicit (positive-only). Default Explicit.
	Mode Mode
	// LearnRate is the factor step size γ, in (0, 1]. Default 0.01.
	LearnRate float64
	// BiasLearnRate is the bias step size γ_b, in (0, 1]. Default 0.01.
	// Biases exist in explicit mode only.
	BiasLearnRate float64
	// Reg is the L2 penalty λ on the factors, ≥ 0. Zero takes the default
	// 0.02 unless NoReg is set.
	Reg float64
	// BiasReg is the L2 penalty λ_b on the biases, ≥ 0. Zero takes the
	// default 0.02 unless NoReg is set.
	BiasReg float64
	// NoReg makes a zero Reg or BiasReg mean no penalty instead of the default.
	NoReg bool
	// MinValue and MaxValue bound the explicit rating scale; predictions are
	// clipped to it. Both zero takes 1..5. MinValue < MaxValue.
	MinValue, MaxValue float64
	// InitStd is the standard deviation of the initial factors, > 0.
	// Default 0.1.
	InitStd float64
	// Decay sets the per-row learning-rate decay by update count n:
	// γ_row = γ·max(1/(1+Decay·n), DecayFloor). Zero turns decay off.
	Decay float64
	// DecayFloor bounds the decay from below, in (0, 1]. Default 0.1.
	DecayFloor float64
	// ClipError bounds |e| in a step (step clipping), > 0. Default: the
	// scale width MaxValue−MinValue (explicit), 1 (implicit).
	ClipError float64
	// Negatives is the number of negatives sampled per positive (implicit
	// only), in [0, MaxNegatives], drawn by popularity from the recent
	// positives. Pointwise: each is a step towards 0. Pairwise: each is one
	// BPR step; zero then means 1.
	Negatives int
	// Pairwise selects the BPR step (Rendle et al. 2009) instead of the
	// pointwise one. Implicit only.
	Pairwise bool
	// MaxUsers and MaxItems cap the live rows per side; 0 = no cap.
	MaxUsers, MaxItems int
	// Seed seeds the initial factors and the negative sampler.
	Seed uint64
}

// fill validates o and fills in its defaults.
func (o Options) fill() (Options, error) {
	bad := func(field, want string, got any) error {
		return fmt.Errorf("online: option %s must be %s, got %v", field, want, got)
	}
	if o.Rank == 0 {
		o.Rank = DefaultRank
	}
	if o.Rank < 1 || o.Rank > MaxRank {
		return o, bad("Rank", fmt.Sprintf("in [1, %d]", MaxRank), o.Rank)
	}
	if o.Mode == 0 {
		o.Mode = Explicit
	}
	if o.Mode != Explicit && o.Mode != Implicit {
		return o, bad("Mode", "explicit or implicit", o.Mode)
	}
	if o.LearnRate == 0 {
		o.LearnRate = DefaultLearnRate
	}
	if !(o.LearnRate > 0 && o.LearnRate <= 1) {
		return o, bad("LearnRate", "in (0, 1]", o.LearnRate)
	}
	if o.BiasLearnRate == 0 {
		o.BiasLearnRate = DefaultBiasLearnRate
	}
	if !(o.BiasLearnRate > 0 && o.BiasLearnRate <= 1) {
		return o, bad("BiasLearnRate", "in (0, 1]", o.BiasLearnRate)
	}
	if o.Reg == 0 && !o.NoReg {
		o.Reg = DefaultReg
	}
	if !(o.Reg >= 0 && o.Reg < 1/o.LearnRate) {
		return o, bad("Reg", "≥ 0 and below 1/LearnRate", o.Reg)
	}
	if o.BiasReg == 0 && !o.NoReg {
		o.BiasReg = DefaultBiasReg
	}
	if !(o.BiasReg >= 0 && o.BiasReg < 1/o.BiasLearnRate) {
		return o, bad("BiasReg", "≥ 0 and below 1/BiasLearnRate", o.BiasReg)
	}
	if o.MinValue == 0 && o.MaxValue == 0 {
		o.MinValue, o.MaxValue = DefaultMinValue, DefaultMaxValue
	}
	if !(o.MinValue < o.MaxValue) || math.IsInf(o.MinValue, 0) || math.IsInf(o.MaxValue, 0) {
		return o, fmt.Errorf("online: option MinValue must be below MaxValue, both finite, got %v and %v", o.MinValue, o.MaxValue)
	}
	if o.InitStd == 0 {
		o.InitStd = DefaultInitStd
	}
	if !(o.InitStd > 0 && o.InitStd < 1e6) {
		return o, bad("InitStd", "in (0, 1e6)", o.InitStd)
	}
	if !(o.Decay >= 0 && !math.IsInf(o.Decay, 0)) {
		return o, bad("Decay", "≥ 0 and finite", o.Decay)
	}
	if o.DecayFloor == 0 {
		o.DecayFloor = DefaultDecayFloor
	}
	if !(o.DecayFloor > 0 && o.DecayFloor <= 1) {
		return o, bad("DecayFloor", "in (0, 1]", o.DecayFloor)
	}
	if o.ClipError == 0 {
		if o.Mode == Explicit {
			o.ClipError = o.MaxValue - o.MinValue
		} else {
			o.ClipError = 1
		}
	}
	if !(o.ClipError > 0 && !math.IsInf(o.ClipError, 0)) {
		return o, bad("ClipError", "> 0 and finite", o.ClipError)
	}
	if o.Negatives < 0 || o.Negatives > MaxNegatives {
		return o, bad("Negatives", fmt.Sprintf("in [0, %d]", MaxNegatives), o.Negatives)
	}
	if o.Mode == Explicit && (o.Negatives != 0 || o.Pairwise) {
		return o, errors.New("online: options Negatives and Pairwise need Mode implicit")
	}
	if o.Pairwise && o.Negatives == 0 {
		o.Negatives = 1
	}
	if o.MaxUsers < 0 || o.MaxUsers > math.MaxInt32 {
		return o, bad("MaxUsers", "in [0, 2^31−1]", o.MaxUsers)
	}
	if o.MaxItems < 0 || o.MaxItems > math.MaxInt32 {
		return o, bad("MaxItems", "in [0, 2^31−1]", o.MaxItems)
	}
	return o, nil
}

// Model holds the user and item factor tables, their ID indexes and the
// state of the SGD steps. It is owned by one goroutine (the trainer) and is
// not safe for concurrent use.
//
// Explicit mode is biased matrix factorization (Koren, Bell & Volinsky,
// "Matrix factorization techniques for recommender systems", IEEE Computer
// 2009): r̂ = μ + b_u + b_i + p_u·q_i. Implicit mode is incremental SGD for
// positive-only feedback (Vinagre, Jorge & Gama, UMAP 2014), optionally with
// popularity-sampled negatives or the BPR pairwise step (Rendle et al.,
// UAI 2009).
type Model struct {
	opts Options
	k    int
	kern kernels
	tab  [2]table
	idx  [2]index

	// Compensated (Neumaier) running sum of ratings: μ = (sum+comp)/n.
	meanSum, meanComp, meanN float64

	tracked   [numConsumers]bool
	trackBits uint8 // bit c set when tracked[c]: mark's quick test
	dirty     [numConsumers][2][]int32
	dels      [numConsumers][]delRec
	delIDs    [numConsumers][]byte

	tomb    map[[sha256.Size]byte]struct{}
	hashBuf []byte

	// Negative sampler: a ring of recent positive item rows; head is the
	// oldest once the ring is full.
	pcg    *rand.PCG
	rng    *rand.Rand
	recent []int32
	head   int

	// Deterministic row initialisation.
	initPCG  *rand.PCG
	initRand *rand.Rand

	// Scratch for the numerical guard.
	saveP, saveQ []float32
	saveN        []float32
	negRows      []int32

	sink float32 // keeps Touch's loads alive
}

// delRec is a pending Deleted record; its ID is delIDs[off:off+n].
type delRec struct {
	side Side
	row  int32
	off  int
	n    int
}

// New validates opts, fills in defaults and returns an empty Model. Errors
// name the option at fault.
func New(opts Options) (*Model, error) {
	o, err := opts.fill()
	if err != nil {
		return nil, err
	}
	m := &Model{opts: o, k: o.Rank, kern: fastKernels}
	for s := range m.tab {
		m.tab[s].k = o.Rank
		m.idx[s] = newIndex()
	}
	m.tab[Users].max = o.MaxUsers
	m.tab[Items].max = o.MaxItems
	attachMappings(m)
	m.tomb = make(map[[sha256.Size]byte]struct{})
	m.pcg = rand.NewPCG(o.Seed, 0x6e65676174697665) // stream constant: "negative"
	m.rng = rand.New(m.pcg)
	m.initPCG = rand.NewPCG(0, 0)
	m.initRand = rand.New(m.initPCG)
	m.saveP = make([]float32, o.Rank)
	m.saveQ = make([]float32, o.Rank)
	m.saveN = make([]float32, o.Negatives*o.Rank)
	m.negRows = make([]int32, 0, o.Negatives)
	if o.Mode == Implicit && o.Negatives > 0 {
		m.recent = make([]int32, 0, RecentSize)
	}
	return m, nil
}

// Options returns the options in force, defaults filled in.
func (m *Model) Options() Options { return m.opts }

// Rank returns k.
func (m *Model) Rank() int { return m.k }

// Rows returns the high-water row count of side s: rows [0, Rows) have been
// allocated at some time (live or freed).
func (m *Model) Rows(s Side) int32 {
	if s > Items {
		return 0
	}
	return m.tab[s].next
}

// Live returns the number of live rows of side s.
func (m *Model) Live(s Side) int {
	if s > Items {
		return 0
	}
	return m.tab[s].live
}

// Mean returns μ, the running mean of the ratings learned from (explicit
// mode), or the middle of the scale before any rating.
func (m *Model) Mean() float64 {
	if m.meanN == 0 {
		return (m.opts.MinValue + m.opts.MaxValue) / 2
	}
	return (m.meanSum + m.meanComp) / m.meanN
}

// addMean adds x to the compensated sum (Neumaier's variant of Kahan
// summation: the rounding error of each addition goes to comp, whichever
// operand is larger).
func (m *Model) addMean(x float64) {
	t := m.meanSum + x
	if math.Abs(m.meanSum) >= math.Abs(x) {
		m.meanComp += (m.meanSum - t) + x
	} else {
		m.meanComp += (x - t) + m.meanSum
	}
	m.meanSum = t
	m.meanN++
}

// Lookup returns the row of id on side s. It does not allocate.
func (m *Model) Lookup(s Side, id []byte) (row int32, ok bool) {
	if s > Items {
		return -1, false
	}
	return m.idx[s].find(id)
}

// ID returns the ID of live row r of side s, or nil. The slice aliases the
// index's arena: read it, do not keep or change it.
func (m *Model) ID(s Side, row int32) []byte {
	if s > Items || !m.tab[s].isLive(row) {
		return nil
	}
	return m.idx[s].id(row)
}

// tombKey returns SHA-256(side byte ‖ id), the form in which erased IDs are
// remembered.
func (m *Model) tombKey(s Side, id []byte) [sha256.Size]byte {
	m.hashBuf = append(append(m.hashBuf[:0], byte(s)), id...)
	return sha256.Sum256(m.hashBuf)
}

// Erased reports whether id was erased from side s.
func (m *Model) Erased(s Side, id []byte) bool {
	if len(m.tomb) == 0 {
		return false
	}
	_, ok := m.tomb[m.tombKey(s, id)]
	return ok
}

// Intern returns the row of id on side s, creating it when id is new: the
// row's factors are drawn from N(0, InitStd²) by a generator seeded from
// (Seed, s, id) alone, so an ID starts from the same vector whatever order
// IDs arrive in. t (ms) becomes the row's last-update time. A known ID does
// not allocate. Errors: ErrErased for an erased ID, ErrFull at the row cap,
// and an error naming the id when it is empty or longer than
// stream.MaxIDLen.
func (m *Model) Intern(s Side, id []byte, t int64) (row int32, created bool, err error) {
	if s > Items {
		return -1, false, fmt.Errorf("online: intern: invalid side %d", s)
	}
	if r, ok := m.idx[s].find(id); ok {
		return r, false, nil
	}
	if len(id) == 0 || len(id) > stream.MaxIDLen {
		return -1, false, fmt.Errorf("online: intern %s: id length %d not in [1, %d]", s, len(id), stream.MaxIDLen)
	}
	if m.Erased(s, id) {
		return -1, false, ErrErased
	}
	tab := &m.tab[s]
	if tab.full() {
		return -1, false, ErrFull
	}
	r := tab.alloc()
	if r < 0 {
		return -1, false, ErrFull
	}
	m.initRow(s, tab.row(r), id)
	tab.m(r).last = t
	m.idx[s].insert(id, r)
	m.mark(s, r)
	return r, true, nil
}

// initRow fills v from the generator PCG(Seed ⊕ mix(s), hash(id)).
func (m *Model) initRow(s Side, v []float32, id []byte) {
	// FNV-1a 64 of the ID, then a splitmix64 finaliser.
	h := uint64(14695981039346656037)
	for _, c := range id {
		h ^= uint64(c)
		h *= 1099511628211
	}
	m.initPCG.Seed(m.opts.Seed^mix64(uint64(s)+0x9e3779b97f4a7c15), mix64(h))
	sd := m.opts.InitStd
	for f := range v {
		v[f] = float32(m.initRand.NormFloat64() * sd)
	}
}

// mix64 is the splitmix64 finaliser (Steele, Lea & Flood, OOPSLA 2014).
func mix64(z uint64) uint64 {
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
	z = (z ^ (z >> 27)) * 0x94d049bb133111eb
	return z ^ (z >> 31)
}

// Predict returns the model's prediction for user row u and item row i:
// explicit clip(μ + b_u + b_i + p_u·q_i) to [MinValue, MaxValue]; implicit
// p_u·q_i. A row that is not live (for example -1 for an unknown ID)
// contributes nothing, so an unknown item predicts μ + b_u.
func (m *Model) Predict(u, i int32) float64 {
	tu, ti := &m.tab[Users], &m.tab[Items]
	lu, li := tu.isLive(u), ti.isLive(i)
	var dot float64
	if lu && li {
		dot = float64(m.kern.dot(tu.row(u), ti.row(i)))
	}
	if m.opts.Mode == Implicit {
		return dot
	}
	r := m.Mean() + dot
	if lu {
		r += float64(tu.m(u).bias)
	}
	if li {
		r += float64(ti.m(i).bias)
	}
	return m.clip(r)
}

func (m *Model) clip(r float64) float64 {
	return min(max(r, m.opts.MinValue), m.opts.MaxValue)
}

func (m *Model) clipErr(e float64) float64 {
	c := m.opts.ClipError
	return min(max(e, -c), c)
}

// rate returns the decay factor of a row with n updates:
// max(1/(1+Decay·n), DecayFloor), or 1 when decay is off.
func (m *Model) rate(n uint32) float64 {
	if m.opts.Decay == 0 {
		return 1
	}
	return max(1/(1+m.opts.Decay*float64(n)), m.opts.DecayFloor)
}

// Touch starts the memory loads of every cache line of user row u and item
// row i and their metadata, so that a trainer can overlap them with
// stepping the events before. On amd64 it issues prefetches, which unlike
// loads do not hold up the instructions after them; elsewhere it reads one
// value per line. Rows out of range are ignored.
func (m *Model) Touch(u, i int32) {
	tu, ti := &m.tab[Users], &m.tab[Items]
	if uint32(u) < uint32(tu.next) && uint32(i) < uint32(ti.next) {
		m.sink += touchPair(tu, ti, u, i)
		return
	}
	var s float32
	for side, r := range [2]int32{u, i} {
		t := &m.tab[side]
		if r < 0 || r >= t.next {
			continue
		}
		s += t.touchRow(r)
	}
	m.sink += s
}

// rowError reports a step on a row that is not live.
func (m *Model) rowError(u, i int32) error {
	if !m.tab[Users].isLive(u) {
		return fmt.Errorf("online: step: user row %d is not live", u)
	}
	return fmt.Errorf("online: step: item row %d is not live", i)
}

// Step learns from one event on user row u and item row i with value
// (rating, or weight in implicit mode) at event time t (ms), and returns the
// prediction measured before the update (what Predict returned just before).
//
// Explicit (Koren, Bell & Volinsky 2009), with r̂ the unclipped prediction
// μ + b_u + b_i + p_u·q_i (the returned prediction is clipped; the gradient
// uses the unclipped r̂, the model's actual output):
//
//	e   = clamp(r − r̂, ±ClipError)
//	b_u ← b_u + γ_b,u (e − λ_b b_u)
//	b_i ← b_i + γ_b,i (e − λ_b b_i)
//	p_u ← p_u + γ_u (e q_i − λ p_u)
//	q_i ← q_i + γ_i (e p_u − λ q_i)     (both read the pre-step p_u, q_i)
//
// then μ takes r into its running mean. Each row's rates are the options'
// rates times max(1/(1+Decay·n_row), DecayFloor).
//
// Implicit pointwise (Vinagre, Jorge & Gama 2014): target 1 with weight w =
// value, e = clamp(w (1 − p_u·q_i), ±ClipError), the same factor step; then
// for each sampled negative j, e = clamp(−p_u·q_j, ±ClipError) and the step
// on (p_u, q_j). Implicit pairwise: see stepBPR.
//
// Numerical guard: both rows (and biases, and sampled rows) are copied to
// scratch before the update; if any new value or the prediction is not
// finite, all are restored bit for bit and Step returns *NonFiniteError;
// nothing else changes. A step on a row that is not live, or with a value
// that is not finite (or not positive, implicit), returns an error and
// changes nothing. Step does not allocate on success.
func (m *Model) Step(u, i int32, value float64, t int64) (pred float64, err error) {
	mu, mi := m.tab[Users].liveMeta(u), m.tab[Items].liveMeta(i)
	if mu == nil || mi == nil {
		return 0, m.rowError(u, i)
	}
	if math.IsNaN(value) || math.IsInf(value, 0) {
		return 0, fmt.Errorf("online: step: value %v is not finite", value)
	}
	if m.opts.Mode == Explicit {
		return m.stepExplicit(u, i, mu, mi, value, t)
	}
	if !(value > 0) {
		return 0, fmt.Errorf("online: step: implicit value (weight) %v must be positive", value)
	}
	if m.opts.Pairwise {
		return m.stepBPR(u, i, value, t)
	}
	return m.stepPointwise(u, i, value, t)
}

// stepExplicit is the explicit step of Step. The numerical guard takes one
// of two paths:
//
// Bounded (no copies, no check). Let M = max_f max(|p_f|, |q_f|) and
// B = max(γ_u, γ_i)·|e|. Each new value is a·x + b·y with a = 1 − γλ in
// (0, 1] (fill keeps λ < 1/γ) and |b| ≤ B, so exactly |a·x + b·y| ≤ M(1 + B).
// Float32 rounds the two products and the sum (or one fused operation), each
// off by a factor of at most 1 + 2⁻²⁴, and a and b themselves are rounded
// to float32; all together well under a factor 2. With M ≤ 1e18 (the kernel
// checks M² ≤ smallSq = 1e36, an overflowing square failing the check) and
// B ≤ maxStepScale = 1e18 the result is below 2·1e18·(1 + 1e18) ≈ 2e36,
// far under float32's largest finite value ≈ 3.4e38: the update cannot
// produce a non-finite value (the inputs are finite: the prediction is), so
// there is nothing to restore and no copy is needed. The biases are
// computed in float64 and checked before any row is written.
//
// Guarded, otherwise: both rows are copied to scratch, updated with the
// checked kernel, and restored from the copies if any new value is not
// finite.
func (m *Model) stepExplicit(u, i int32, mu, mi *rowMeta, r float64, t int64) (float64, error) {
	p, q := m.tab[Users].row(u), m.tab[Items].row(i)
	d, small := m.kern.dotBound(p, q)
	raw := m.Mean() + float64(mu.bias) + float64(mi.bias) + float64(d)
	pred := m.clip(raw)
	if math.IsNaN(raw) || math.IsInf(raw, 0) {
		return raw, &NonFiniteError{User: u, Item: i}
	}
	e := m.clipErr(r - raw)
	o := &m.opts
	fu, fi := m.rate(mu.count), m.rate(mi.count)
	gu, gi := o.LearnRate*fu, o.LearnRate*fi
	bu, bi := float64(mu.bias), float64(mi.bias)
	nbu := float32(bu + o.BiasLearnRate*fu*(e-o.BiasReg*bu))
	nbi := float32(bi + o.BiasLearnRate*fi*(e-o.BiasReg*bi))
	a1, b1, a2, b2 := float32(1-gu*o.Reg), float32(gu*e), float32(1-gi*o.Reg), float32(gi*e)
	if (nbu-nbu)+(nbi-nbi) != 0 {
		return pred, &NonFiniteError{User: u, Item: i}
	}
	if small && max(gu, gi)*math.Abs(e) <= maxStepScale {
		m.kern.updateFree(p, q, a1, b1, a2, b2)
	} else {
		copy(m.saveP, p)
		copy(m.saveQ, q)
		if m.kern.update(p, q, a1, b1, a2, b2) != 0 {
			copy(p, m.saveP)
			copy(q, m.saveQ)
			return pred, &NonFiniteError{User: u, Item: i}
		}
	}
	mu.bias, mi.bias = nbu, nbi
	mu.count++
	mi.count++
	mu.last, mi.last = t, t
	m.addMean(r)
	if m.trackBits != 0 {
		m.mark(Users, u)
		m.mark(Items, i)
	}
	return pred, nil
}

func (m *Model) stepPointwise(u, i int32, w float64, t int64) (float64, error) {
	tu, ti := &m.tab[Users], &m.tab[Items]
	p, q := tu.row(u), ti.row(i)
	mu, mi := tu.m(u), ti.m(i)
	d := m.kern.dot(p, q)
	pred := float64(d)
	if d-d != 0 {
		return pred, &NonFiniteError{User: u, Item: i}
	}
	o := &m.opts
	gu, gi := o.LearnRate*m.rate(mu.count), o.LearnRate*m.rate(mi.count)
	e := m.clipErr(w * (1 - pred))
	copy(m.saveP, p)
	copy(m.saveQ, q)
	au := float32(1 - gu*o.Reg)
	chk := m.kern.update(p, q, au, float32(gu*e), float32(1-gi*o.Reg), float32(gi*e))
	m.negRows = m.negRows[:0]
	for n := 0; n < o.Negatives && chk == 0; n++ {
		j := m.sample(i)
		if j < 0 {
			continue
		}
		qj := ti.row(j)
		copy(m.saveN[len(m.negRows)*m.k:][:m.k], qj)
		m.negRows = append(m.negRows, j)
		dj := m.kern.dot(p, qj)
		ej := m.clipErr(-float64(dj))
		gj := o.LearnRate * m.rate(ti.m(j).count)
		chk += dj - dj
		chk += m.kern.update(p, qj, au, float32(gu*ej), float32(1-gj*o.Reg), float32(gj*ej))
	}
	if chk != 0 {
		m.undoNegatives()
		copy(p, m.saveP)
		copy(q, m.saveQ)
		return pred, &NonFiniteError{User: u, Item: i}
	}
	m.finishImplicit(u, i, t)
	return pred, nil
}

// undoNegatives restores the sampled rows, newest first, so a row sampled
// twice ends at its value before the step.
func (m *Model) undoNegatives() {
	ti := &m.tab[Items]
	for n := len(m.negRows) - 1; n >= 0; n-- {
		copy(ti.row(m.negRows[n]), m.saveN[n*m.k:][:m.k])
	}
}

// finishImplicit books a successful implicit step: counts, times, dirty
// marks, and i into the reservoir of recent positives.
func (m *Model) finishImplicit(u, i int32, t int64) {
	tu, ti := &m.tab[Users], &m.tab[Items]
	mu, mi := tu.m(u), ti.m(i)
	mu.count++
	mi.count++
	mu.last, mi.last = t, t
	m.mark(Users, u)
	m.mark(Items, i)
	for _, j := range m.negRows {
		mj := ti.m(j)
		mj.count++
		mj.last = t
		m.mark(Items, j)
	}
	m.pushRecent(i)
}

// stepBPR is the pairwise step of BPR (Rendle, Freudenthaler, Gantner &
// Schmidt-Thieme, "BPR: Bayesian personalized ranking from implicit
// feedback", UAI 2009), by gradient ascent on w·ln σ(x) − λ‖Θ‖² for each
// sampled negative j:
//
//	x   = p_u·(q_i − q_j)
//	g   = clamp(w·σ(−x), ±ClipError) = w / (1 + eˣ), clamped
//	p_u ← p_u + γ_u (g (q_i − q_j) − λ p_u)
//	q_i ← q_i + γ_i (g p_u − λ q_i)
//	q_j ← q_j + γ_j (−g p_u − λ q_j)        (all read pre-step values)
//
// When no negative can be drawn (the reservoir is empty or only holds i)
// the pointwise positive step runs instead, so the first events still
// teach the model something.
func (m *Model) stepBPR(u, i int32, w float64, t int64) (float64, error) {
	tu, ti := &m.tab[Users], &m.tab[Items]
	p, q := tu.row(u), ti.row(i)
	mu, mi := tu.m(u), ti.m(i)
	di := m.kern.dot(p, q)
	pred := float64(di)
	if di-di != 0 {
		return pred, &NonFiniteError{User: u, Item: i}
	}
	o := &m.opts
	gu, gi := o.LearnRate*m.rate(mu.count), o.LearnRate*m.rate(mi.count)
	copy(m.saveP, p)
	copy(m.saveQ, q)
	m.negRows = m.negRows[:0]
	var chk float32
	for n := 0; n < o.Negatives && chk == 0; n++ {
		j := m.sample(i)
		if j < 0 {
			continue
		}
		qj := ti.row(j)
		copy(m.saveN[len(m.negRows)*m.k:][:m.k], qj)
		m.negRows = append(m.negRows, j)
		x := float64(m.kern.dot(p, q)) - float64(m.kern.dot(p, qj))
		g := m.clipErr(w / (1 + math.Exp(x)))
		gj := o.LearnRate * m.rate(ti.m(j).count)
		chk += float32(x - x)
		chk += bprUpdate(p, q, qj, float32(1-gu*o.Reg), float32(gu*g),
			float32(1-gi*o.Reg), float32(gi*g), float32(1-gj*o.Reg), float32(gj*g))
	}
	if len(m.negRows) == 0 && chk == 0 {
		e := m.clipErr(w * (1 - pred))
		chk = m.kern.update(p, q, float32(1-gu*o.Reg), float32(gu*e), float32(1-gi*o.Reg), float32(gi*e))
	}
	if chk != 0 {
		m.undoNegatives()
		copy(p, m.saveP)
		copy(q, m.saveQ)
		return pred, &NonFiniteError{User: u, Item: i}
	}
	m.finishImplicit(u, i, t)
	return pred, nil
}

// bprUpdate applies one BPR step in place, all three reading pre-step values:
//
//	p'  = ap·p  + bp·(qi − qj)
//	qi' = ai·qi + bi·p
//	qj' = aj·qj − bj·p
//
// and returns the finiteness check (0, or NaN).
func bprUpdate(p, qi, qj []float32, ap, bp, ai, bi, aj, bj float32) float32 {
	qi = qi[:len(p)]
	qj = qj[:len(p)]
	var chk float32
	for f, x := range p {
		yi, yj := qi[f], qj[f]
		np := ap*x + bp*(yi-yj)
		ni := ai*yi + bi*x
		nj := aj*yj - bj*x
		p[f], qi[f], qj[f] = np, ni, nj
		chk += (np - np) + (ni - ni) + (nj - nj)
	}
	return chk
}

// pushRecent adds item row i to the ring of recent positives.
func (m *Model) pushRecent(i int32) {
	if cap(m.recent) == 0 {
		return
	}
	if len(m.recent) < cap(m.recent) {
		m.recent = append(m.recent, i)
		return
	}
	m.recent[m.head] = i
	m.head++
	if m.head == len(m.recent) {
		m.head = 0
	}
}

// sample draws an item row uniformly from the recent positives, which is
// drawing by recent popularity. It returns -1 when the draw is i itself or
// the reservoir is empty. Draws are indexed oldest-first, so the state in
// ModelMeta.Recent replays exactly.
func (m *Model) sample(i int32) int32 {
	n := len(m.recent)
	if n == 0 {
		return -1
	}
	c := m.rng.IntN(n)
	j := m.recent[(m.head+c)%n]
	if j == i {
		return -1
	}
	return j
}

// recentOrdered returns the reservoir oldest first.
func (m *Model) recentOrdered() []int32 {
	n := len(m.recent)
	out := make([]int32, n)
	for c := range n {
		out[c] = m.recent[(m.head+c)%n]
	}
	return out
}

// dropRecent removes item row r from the reservoir (it was freed).
func (m *Model) dropRecent(r int32) {
	if len(m.recent) == 0 {
		return
	}
	ord := m.recentOrdered()
	m.recent = m.recent[:0]
	for _, j := range ord {
		if j != r {
			m.recent = append(m.recent, j)
		}
	}
	m.head = 0
}

// Track turns dirty tracking for consumer c on or off. Turning it off
// forgets c's pending rows and Deleted records; turning it on starts from
// nothing (a consumer that needs everything takes a full copy).
func (m *Model) Track(c Consumer, on bool) {
	if c >= numConsumers || m.tracked[c] == on {
		return
	}
	m.tracked[c] = on
	m.trackBits ^= 1 << c
	if !on {
		m.clearDirty(c)
	}
}

func (m *Model) clearDirty(c Consumer) {
	bit := uint8(1) << c
	for s := range m.dirty[c] {
		for _, r := range m.dirty[c][s] {
			m.tab[s].m(r).flags &^= bit
		}
		m.dirty[c][s] = m.dirty[c][s][:0]
	}
	m.dels[c] = m.dels[c][:0]
	clear(m.delIDs[c])
	m.delIDs[c] = m.delIDs[c][:0]
}

// mark puts row r of side s on the dirty list of each tracked consumer that
// does not have it yet: a flag test per consumer, an append only on the
// first change since the consumer's last TakeDirty.
func (m *Model) mark(s Side, r int32) {
	md := m.tab[s].m(r)
	if m.trackBits&^md.flags == 0 {
		return // every tracked consumer has the row already (or none is tracked)
	}
	for c := range Consumer(numConsumers) {
		bit := uint8(1) << c
		if m.tracked[c] && md.flags&bit == 0 {
			md.flags |= bit
			m.dirty[c][s] = append(m.dirty[c][s], r)
		}
	}
}

// DirtyLen returns how many records TakeDirty(c) would give at most (rows
// marked since the last take, and Deleted records).
func (m *Model) DirtyLen(c Consumer) int {
	if c >= numConsumers {
		return 0
	}
	return len(m.dels[c]) + len(m.dirty[c][Users]) + len(m.dirty[c][Items])
}

// TakeDirty appends to dst a copy of every row changed since c's previous
// take, and the Deleted records of erasures since then, and clears c's
// marks. A row changed many times appears once, with its current values.
// Deleted records come first, in erasure order, then users, then items: a
// freed row that was reused appears as its new owner after the Deleted
// record of its old one. dst.Rank is set to Rank when zero.
func (m *Model) TakeDirty(c Consumer, dst *RowSet) {
	if c >= numConsumers {
		return
	}
	if dst.Rank == 0 {
		dst.Rank = m.k
	}
	for _, d := range m.dels[c] {
		dst.Append(RowRecord{Side: d.side, Row: d.row, ID: m.delIDs[c][d.off : d.off+d.n], Deleted: true})
	}
	bit := uint8(1) << c
	for s := range m.dirty[c] {
		t := &m.tab[s]
		for _, r := range m.dirty[c][s] {
			md := t.m(r)
			md.flags &^= bit
			if md.flags&flagLive != 0 {
				dst.Append(m.record(Side(s), r))
			}
		}
		m.dirty[c][s] = m.dirty[c][s][:0]
	}
	m.dels[c] = m.dels[c][:0]
	clear(m.delIDs[c]) // erased IDs do not linger
	m.delIDs[c] = m.delIDs[c][:0]
}

// record returns live row r as a RowRecord aliasing the tables (RowSet.Append
// copies it).
func (m *Model) record(s Side, r int32) RowRecord {
	t := &m.tab[s]
	md := t.m(r)
	return RowRecord{Side: s, Row: r, ID: m.idx[s].id(r), Bias: md.bias, Count: md.count,
		Last: md.last, Epoch: md.epoch, Vec: t.row(r)}
}

// CopyRows appends to dst a copy of every live row of side s in [from, to)
// (clamped to [0, Rows(s))), for snapshots taken chunk by chunk. It does not
// touch dirty marks. dst.Rank is set to Rank when zero.
func (m *Model) CopyRows(s Side, from, to int32, dst *RowSet) {
	if s > Items {
		return
	}
	if dst.Rank == 0 {
		dst.Rank = m.k
	}
	t := &m.tab[s]
	from = max(from, 0)
	to = min(to, t.next)
	for r := from; r < to; r++ {
		if t.m(r).flags&flagLive != 0 {
			dst.Append(m.record(s, r))
		}
	}
}

// Erase removes id from side s for good: its row is wiped and freed, its ID
// bytes in the index are zeroed, and a tombstone — the SHA-256 of the side
// byte and the ID, never the ID — makes Intern refuse it from now on with
// ErrErased. Each tracked consumer gets a Deleted record. The tombstone is
// recorded even when id is unknown (found = false), so events still in
// flight cannot bring it in later.
func (m *Model) Erase(s Side, id []byte) (found bool) {
	if s > Items || len(id) == 0 || len(id) > stream.MaxIDLen {
		return false
	}
	m.tomb[m.tombKey(s, id)] = struct{}{}
	r, ok := m.idx[s].find(id)
	if !ok {
		return false
	}
	for c := range Consumer(numConsumers) {
		if m.tracked[c] {
			off := len(m.delIDs[c])
			m.delIDs[c] = append(m.delIDs[c], id...)
			m.dels[c] = append(m.dels[c], delRec{side: s, row: r, off: off, n: len(id)})
		}
	}
	m.free(s, r, id)
	return true
}

// free removes id (at row r) from the index, wipes and frees r.
func (m *Model) free(s Side, r int32, id []byte) {
	m.idx[s].remove(id)
	m.tab[s].release(r)
	if s == Items {
		m.dropRecent(r)
	}
}

// ScoresTo sets dst[r] to the ranking score of item row r for user row u,
// p_u·q_r (+ b_r in explicit mode: μ + b_u is the same for every item), and
// −Inf for freed rows, for r in [0, Rows(Items)). dst is reused when large
// enough and allocated otherwise (nil is fine). A user row that is not live
// scores every item −Inf.
func (m *Model) ScoresTo(dst []float32, u int32) []float32 {
	ti := &m.tab[Items]
	n := int(ti.next)
	if cap(dst) < n {
		dst = make([]float32, n)
	}
	dst = dst[:n]
	ninf := float32(math.Inf(-1))
	if !m.tab[Users].isLive(u) {
		for r := range dst {
			dst[r] = ninf
		}
		return dst
	}
	p := m.tab[Users].row(u)
	bias := m.opts.Mode == Explicit
	for c := 0; c*chunkRows < n; c++ {
		vec, meta := ti.vec[c], ti.meta[c]
		end := min(n-c*chunkRows, chunkRows)
		out := dst[c*chunkRows : c*chunkRows+end]
		for r := range out {
			md := &meta[r]
			if md.flags&flagLive == 0 {
				out[r] = ninf
				continue
			}
			s := m.kern.dot(p, vec[r*m.k:][:m.k])
			if bias {
				s += md.bias
			}
			out[r] = s
		}
	}
	return dst
}

// Meta returns a copy of the non-row state: running mean, high-water marks,
// free lists, tombstones (sorted hex digests), sampler state and reservoir.
func (m *Model) Meta() ModelMeta {
	mm := ModelMeta{MeanSum: m.meanSum, MeanComp: m.meanComp, MeanN: m.meanN}
	for s := range m.tab {
		mm.Next[s] = m.tab[s].next
		mm.Free[s] = slices.Clone(m.tab[s].free)
	}
	if len(m.tomb) > 0 {
		mm.Tombstones = make([]string, 0, len(m.tomb))
		for k := range m.tomb {
			mm.Tombstones = append(mm.Tombstones, hex.EncodeToString(k[:]))
		}
		slices.Sort(mm.Tombstones)
	}
	if m.opts.Mode == Implicit {
		mm.RNG, _ = m.pcg.MarshalBinary() // never fails
		mm.Recent = m.recentOrdered()
	}
	return mm
}

// Restore sets the non-row state from meta. Recovery calls it once, after
// the last ApplyRecord: meta must agree with the rows (every row below
// Next is live or on the free list, exactly once; the reservoir holds live
// item rows), or Restore returns an error naming the field and changes
// nothing.
func (m *Model) Restore(meta ModelMeta) error {
	if !(meta.MeanN >= 0) || math.IsInf(meta.MeanN, 0) || math.IsNaN(meta.MeanSum) ||
		math.IsInf(meta.MeanSum, 0) || math.IsNaN(meta.MeanComp) || math.IsInf(meta.MeanComp, 0) {
		return fmt.Errorf("online: restore: mean_sum, mean_comp, mean_n must be finite and mean_n ≥ 0, got %v, %v, %v",
			meta.MeanSum, meta.MeanComp, meta.MeanN)
	}
	for s := range m.tab {
		t := &m.tab[s]
		next := meta.Next[s]
		if next < 0 || next < t.next && t.live > 0 && lastLive(t) >= next {
			return fmt.Errorf("online: restore: next[%d] = %d is below a live %s row", s, next, Side(s))
		}
		if next > t.next+MaxRowGap {
			return fmt.Errorf("online: restore: next[%d] = %d is too far past the rows (%d)", s, next, t.next)
		}
		seen := make(map[int32]bool, len(meta.Free[s]))
		for j, r := range meta.Free[s] {
			if r < 0 || r >= next || seen[r] || t.isLive(r) {
				return fmt.Errorf("online: restore: free[%d][%d] = %d is out of range, repeated or live", s, j, r)
			}
			seen[r] = true
		}
		if t.live+len(meta.Free[s]) != int(next) {
			return fmt.Errorf("online: restore: next[%d] = %d but %d live %s rows and %d free", s, next, t.live, Side(s), len(meta.Free[s]))
		}
	}
	tomb := make(map[[sha256.Size]byte]struct{}, len(meta.Tombstones))
	for j, h := range meta.Tombstones {
		var k [sha256.Size]byte
		if len(h) != 2*sha256.Size {
			return fmt.Errorf("online: restore: tombstones[%d] is not a SHA-256 hex digest", j)
		}
		if _, err := hex.Decode(k[:], []byte(h)); err != nil {
			return fmt.Errorf("online: restore: tombstones[%d]: %v", j, err)
		}
		tomb[k] = struct{}{}
	}
	pcg := rand.NewPCG(0, 0)
	*pcg = *m.pcg
	if len(meta.RNG) > 0 {
		if err := pcg.UnmarshalBinary(meta.RNG); err != nil {
			return fmt.Errorf("online: restore: rng: %v", err)
		}
	}
	if len(meta.Recent) > RecentSize {
		return fmt.Errorf("online: restore: recent has %d rows, more than %d", len(meta.Recent), RecentSize)
	}
	for j, r := range meta.Recent {
		if !m.tab[Items].isLive(r) {
			return fmt.Errorf("online: restore: recent[%d] = %d is not a live item row", j, r)
		}
	}
	if len(meta.Recent) > 0 && cap(m.recent) == 0 {
		return errors.New("online: restore: recent given but the model samples no negatives")
	}
	// Everything checked: apply.
	m.meanSum, m.meanComp, m.meanN = meta.MeanSum, meta.MeanComp, meta.MeanN
	for s := range m.tab {
		t := &m.tab[s]
		t.grow(meta.Next[s])
		t.next = meta.Next[s]
		t.free = append(t.free[:0], meta.Free[s]...)
	}
	m.tomb = tomb
	*m.pcg = *pcg
	if cap(m.recent) > 0 {
		m.recent = append(m.recent[:0], meta.Recent...)
		m.head = 0
	}
	return nil
}

// lastLive returns the highest live row of t, or -1.
func lastLive(t *table) int32 {
	for r := t.next - 1; r >= 0; r-- {
		if t.m(r).flags&flagLive != 0 {
			return r
		}
	}
	return -1
}

// ApplyRecord puts a recovered row back exactly (ID, factors, bias, count,
// time, epoch) at rec.Row, replacing whatever held that row, or applies a
// Deleted record (frees the ID's row and records its tombstone). Records are
// applied in log order; later ones overwrite earlier ones. Tombstones and
// the row caps are not checked (a fuzzy snapshot can hold a row erased later
// in the log, so both may be exceeded until the log is applied), and no
// dirty marks are set. Errors name the field at fault and change nothing.
func (m *Model) ApplyRecord(rec *RowRecord) error {
	if rec == nil {
		return errors.New("online: apply record: nil record")
	}
	if rec.Side > Items {
		return fmt.Errorf("online: apply record: side %d invalid", rec.Side)
	}
	s := rec.Side
	if len(rec.ID) == 0 || len(rec.ID) > stream.MaxIDLen {
		return fmt.Errorf("online: apply record %s row %d: id length %d not in [1, %d]", s, rec.Row, len(rec.ID), stream.MaxIDLen)
	}
	t, x := &m.tab[s], &m.idx[s]
	if rec.Deleted {
		m.tomb[m.tombKey(s, rec.ID)] = struct{}{}
		if r, ok := x.find(rec.ID); ok {
			m.free(s, r, rec.ID)
		}
		return nil
	}
	if rec.Row < 0 || rec.Row > t.next+MaxRowGap {
		return fmt.Errorf("online: apply record %s: row %d out of range [0, %d]", s, rec.Row, t.next+MaxRowGap)
	}
	if len(rec.Vec) != m.k {
		return fmt.Errorf("online: apply record %s row %d: vec has %d values, want %d", s, rec.Row, len(rec.Vec), m.k)
	}
	if c := finiteCheck(rec.Vec) + (rec.Bias - rec.Bias); c != 0 {
		return fmt.Errorf("online: apply record %s row %d: vec or bias not finite", s, rec.Row)
	}
	if r, ok := x.find(rec.ID); ok && r != rec.Row {
		m.free(s, r, rec.ID)
	}
	if t.isLive(rec.Row) {
		if cur := x.id(rec.Row); !bytesEqual(cur, rec.ID) {
			x.remove(cur)
			x.insert(rec.ID, rec.Row)
		}
	} else {
		t.claim(rec.Row)
		x.insert(rec.ID, rec.Row)
	}
	copy(t.row(rec.Row), rec.Vec)
	md := t.m(rec.Row)
	md.bias, md.count, md.last, md.epoch = rec.Bias, rec.Count, rec.Last, rec.Epoch
	return nil
}

func bytesEqual(a, b []byte) bool { return string(a) == string(b) }
