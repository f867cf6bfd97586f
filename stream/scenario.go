package stream

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"strconv"
)

// Defaults for ScenarioOptions.
const (
	DefaultScenarioRank        = 8
	DefaultScenarioCommunities = 6
	DefaultScenarioListeners   = 2000
	DefaultScenarioShows       = 300
	DefaultScenarioMean        = 3.5
	DefaultScenarioNoise       = 0.5
	DefaultScenarioSNR         = 4
	DefaultScenarioRate        = 100
	DefaultScenarioCandidates  = 50
	// DefaultScenarioStart is 2026-01-01T00:00:00Z in epoch milliseconds.
	DefaultScenarioStart int64 = 1767225600000
	// defaultEndlessArrivals is the index by which everyone has arrived in an
	// endless scenario.
	defaultEndlessArrivals = 1_000_000
	// maxPlanted bounds the planted factor tables (rows × rank per side).
	maxPlanted = 1 << 26
)

// ScenarioOptions configure the built-in demo: a fictional podcast app in
// which listeners rate (explicit) or play (implicit) shows. A zero field takes
// the default named in its comment.
type ScenarioOptions struct {
	// Seed selects the scenario: equal seeds and options give equal events.
	Seed uint64
	// Events is the number of events before io.EOF; 0 means endless.
	Events int64
	// BatchSize is the number of events per batch. If zero, DefaultBatchSize.
	BatchSize int
	// Implicit makes events plays (value 1) instead of ratings.
	Implicit bool
	// Rank is the planted rank k. If zero, DefaultScenarioRank.
	Rank int
	// Communities is the number of taste communities C. If zero,
	// DefaultScenarioCommunities.
	Communities int
	// Listeners and Shows are the final populations. If zero,
	// DefaultScenarioListeners and DefaultScenarioShows.
	Listeners, Shows int
	// InitialListeners and InitialShows are active from the first event. If
	// zero, a tenth of the listeners and a fifth of the shows (at least 1).
	InitialListeners, InitialShows int
	// ArrivalsUntil is the event index by which every listener and show has
	// arrived; arrivals are spread evenly before it, and each newcomer is the
	// subject of the event at which it arrives, so no event at or after
	// ArrivalsUntil names a new listener or show. If zero, half of Events, or
	// 1,000,000 for an endless scenario. It is raised if needed to at least
	// the number of arrivals on each side.
	ArrivalsUntil int64
	// Mean is the global mean rating μ. If zero, DefaultScenarioMean.
	Mean float64
	// Noise is the rating noise σ. If zero, DefaultScenarioNoise.
	Noise float64
	// SNR is the ratio of the variance of the planted signal
	// b_u + b_i + p_u·q_i to σ². If zero, DefaultScenarioSNR.
	SNR float64
	// ShiftAt is the index of the first event after the taste shift; 0 means
	// no shift.
	ShiftAt int64
	// ClipMin and ClipMax clip ratings when ClipMax > ClipMin. Zero means no
	// clipping: clipping distorts the noise, so the default keeps ratings
	// continuous and unbounded.
	ClipMin, ClipMax float64
	// Step rounds ratings to a multiple of Step (0.5 for half stars), after
	// clipping. Zero means continuous ratings.
	Step float64
	// Start is the time of the first event in epoch milliseconds. If zero,
	// DefaultScenarioStart (2026-01-01T00:00:00Z).
	Start int64
	// Rate is the number of events per second of model time. If zero,
	// DefaultScenarioRate.
	Rate float64
	// Candidates is, in implicit mode, the number of shows a listener picks
	// among for one play. If zero, DefaultScenarioCandidates.
	Candidates int
}

// Scenario generates the demo event stream. It implements Source: Position
// has Source "scenario", the Seed, and Offset = the index of the next event.
//
// # Planted truth
//
// Each listener u belongs to one of C communities g(u) and has taste
// p_u = c_g(u) + δ_u; each show i has a vector q_i and a bias b_i; each
// listener has a bias b_u. A rating is
//
//	r = μ + b_u + b_i + p_u·q_i + ε,   ε ~ N(0, σ²)
//
// (the biased matrix-factorization model of Koren, Bell and Volinsky,
// "Matrix factorization techniques for recommender systems", IEEE Computer
// 2009), optionally clipped and rounded. The parts are scaled so that the
// signal variance V = SNR·σ² splits as Var(b_u) = Var(b_i) = V/8 and
// E[(p_u·q_i)²] = 3V/4, with equal per-component variances s² = sqrt(3V/(4k))
// for p and q, of which the community vector carries 80% (|c_g|² = 0.8·k·s²
// exactly) and the personal offset δ_u ~ N(0, 0.2·s²) the rest. Biases and
// show vectors are rescaled so that these moments hold exactly over the
// population, not only in expectation. Listeners and shows of an event are
// drawn uniformly among those active.
//
// In implicit mode a listener plays one of Candidates shows drawn uniformly,
// chosen with probability ∝ exp((b_i + p_u·q_i)/T), T = sqrt(V)/2, value 1.
//
// From event ShiftAt on, community g takes the taste vector of community
// (g+1) mod C. For a predictor that knows the pre-shift truth this raises the
// expected squared error by ShiftLoss().
//
// Event i is a pure function of (seed, i): its random draws come from a PCG
// generator seeded with the seed and a SplitMix64 hash of i, so a scenario
// opened at index n generates event n directly.
type Scenario struct {
	o         ScenarioOptions
	k         int
	v         float64 // signal variance target
	comm      []int32
	commVec   []float64 // C × k
	userDelta []float64 // listeners × k
	userBias  []float64
	showVec   []float64 // shows × k
	showBias  []float64
	temp      float64
	next      int64
	pcg       rand.PCG
	rng       *rand.Rand
	batch     Batch
	user, itm []byte
	eid       []byte
	cand      []int32
	weights   []float64
	p         []float64 // scratch taste vector
}

var _ Source = (*Scenario)(nil)

// NewScenario builds the scenario and positions it at from (a zero from
// starts at event 0; otherwise from must be a scenario Position with the
// same seed).
func NewScenario(o ScenarioOptions, from Position) (*Scenario, error) {
	def := func(p *int, d int) {
		if *p == 0 {
			*p = d
		}
	}
	def(&o.BatchSize, DefaultBatchSize)
	def(&o.Rank, DefaultScenarioRank)
	def(&o.Communities, DefaultScenarioCommunities)
	def(&o.Listeners, DefaultScenarioListeners)
	def(&o.Shows, DefaultScenarioShows)
	def(&o.InitialListeners, max(1, o.Listeners/10))
	def(&o.InitialShows, max(1, o.Shows/5))
	def(&o.Candidates, DefaultScenarioCandidates)
	if o.Mean == 0 {
		o.Mean = DefaultScenarioMean
	}
	if o.Noise == 0 {
		o.Noise = DefaultScenarioNoise
	}
	if o.SNR == 0 {
		o.SNR = DefaultScenarioSNR
	}
	if o.Rate == 0 {
		o.Rate = DefaultScenarioRate
	}
	if o.Start == 0 {
		o.Start = DefaultScenarioStart
	}
	switch {
	case o.Events < 0:
		return nil, fmt.Errorf("stream: scenario: events %d is negative", o.Events)
	case o.BatchSize < 0 || o.Rank < 0 || o.Communities < 0 || o.Listeners < 0 || o.Shows < 0 || o.Candidates < 0:
		return nil, errors.New("stream: scenario: batch size, rank, communities, listeners, shows and candidates must be positive")
	case o.InitialListeners < 1 || o.InitialListeners > o.Listeners:
		return nil, fmt.Errorf("stream: scenario: initial listeners %d not in [1, %d]", o.InitialListeners, o.Listeners)
	case o.InitialShows < 1 || o.InitialShows > o.Shows:
		return nil, fmt.Errorf("stream: scenario: initial shows %d not in [1, %d]", o.InitialShows, o.Shows)
	case o.Listeners*o.Rank > maxPlanted || o.Shows*o.Rank > maxPlanted:
		return nil, fmt.Errorf("stream: scenario: population × rank above %d", maxPlanted)
	case o.Communities > o.Listeners || o.Communities > math.MaxInt32:
		return nil, fmt.Errorf("stream: scenario: %d communities for %d listeners", o.Communities, o.Listeners)
	case !(o.Noise > 0) || !(o.SNR > 0) || !(o.Rate > 0) || math.IsInf(o.Noise+o.SNR+o.Rate+o.Mean, 0) || math.IsNaN(o.Mean):
		return nil, errors.New("stream: scenario: noise, SNR and rate must be positive and finite, and the mean finite")
	case o.Step < 0 || o.ShiftAt < 0 || o.ArrivalsUntil < 0:
		return nil, errors.New("stream: scenario: step, shift index and arrivals index must not be negative")
	}
	if o.ArrivalsUntil == 0 {
		o.ArrivalsUntil = o.Events / 2
		if o.Events == 0 {
			o.ArrivalsUntil = defaultEndlessArrivals
		}
	}
	o.ArrivalsUntil = max(o.ArrivalsUntil, int64(o.Listeners-o.InitialListeners), int64(o.Shows-o.InitialShows), 1)

	s := &Scenario{o: o, k: o.Rank}
	if !from.IsZero() {
		if from.Source != "scenario" || from.Seed != o.Seed {
			return nil, fmt.Errorf("stream: scenario seed %d: cannot resume from %s", o.Seed, from)
		}
		if from.Offset < 0 || (o.Events > 0 && from.Offset > o.Events) {
			return nil, fmt.Errorf("stream: scenario seed %d: resume index %d out of range", o.Seed, from.Offset)
		}
		s.next = from.Offset
	}
	s.plant()
	s.rng = rand.New(&s.pcg)
	s.cand = make([]int32, o.Candidates)
	s.weights = make([]float64, o.Candidates)
	s.p = make([]float64, o.Rank)
	s.batch.Events = make([]Event, 0, o.BatchSize)
	return s, nil
}

// plant draws the planted factors from a generator seeded by the seed alone.
func (s *Scenario) plant() {
	o, k := s.o, s.k
	rng := rand.New(rand.NewPCG(o.Seed, 0x706c616e74)) // "plant"
	s.v = o.SNR * o.Noise * o.Noise
	s2 := math.Sqrt(0.75 * s.v / float64(k)) // per-component variance of p and q
	s.temp = math.Sqrt(s.v) / 2

	s.commVec = make([]float64, o.Communities*k)
	for g := range o.Communities {
		c := s.commVec[g*k : (g+1)*k]
		var n2 float64
		for j := range c {
			c[j] = rng.NormFloat64()
			n2 += c[j] * c[j]
		}
		scale := math.Sqrt(0.8 * float64(k) * s2 / n2) // |c|² = 0.8·k·s² exactly
		for j := range c {
			c[j] *= scale
		}
	}
	s.comm = make([]int32, o.Listeners)
	s.userDelta = make([]float64, o.Listeners*k)
	s.userBias = make([]float64, o.Listeners)
	sd := math.Sqrt(0.2 * s2)
	for u := range o.Listeners {
		s.comm[u] = int32(rng.IntN(o.Communities))
		for j := range k {
			s.userDelta[u*k+j] = sd * rng.NormFloat64()
		}
		s.userBias[u] = rng.NormFloat64()
	}
	s.showVec = make([]float64, o.Shows*k)
	s.showBias = make([]float64, o.Shows)
	for i := range o.Shows {
		for j := range k {
			s.showVec[i*k+j] = rng.NormFloat64()
		}
		s.showBias[i] = rng.NormFloat64()
	}
	standardize(s.userBias, math.Sqrt(s.v/8))
	standardize(s.showBias, math.Sqrt(s.v/8))
	// Mean squared norm of q equal to k·s² exactly.
	var n2 float64
	for _, x := range s.showVec {
		n2 += x * x
	}
	scale := math.Sqrt(float64(k) * s2 * float64(o.Shows) / n2)
	for j := range s.showVec {
		s.showVec[j] *= scale
	}
}

// standardize shifts and scales x to mean 0 and population standard
// deviation sd (a single element becomes 0).
func standardize(x []float64, sd float64) {
	var m float64
	for _, v := range x {
		m += v
	}
	m /= float64(len(x))
	var ss float64
	for i := range x {
		x[i] -= m
		ss += x[i] * x[i]
	}
	if ss == 0 {
		return
	}
	f := sd / math.Sqrt(ss/float64(len(x)))
	for i := range x {
		x[i] *= f
	}
}

// active returns the population active at event i: initial + ⌊extra·(i+1)/A⌋
// for extra = final − initial arrivals spread over the first A events, so that
// the last one arrives at event A − 1. With extra ≤ A at most one arrives per
// event. Index −1 gives initial.
func active(initial, final int, i, until int64) int {
	if i+1 >= until {
		return final
	}
	return initial + int(int64(final-initial)*(i+1)/until)
}

// splitmix64 is the SplitMix64 output function (G. Steele, D. Lea, C. Flood,
// "Fast splittable pseudorandom number generators", OOPSLA 2014).
func splitmix64(x uint64) uint64 {
	x += 0x9e3779b97f4a7c15
	x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9
	x = (x ^ (x >> 27)) * 0x94d049bb133111eb
	return x ^ (x >> 31)
}

// taste returns the community whose vector listener u has at event i.
func (s *Scenario) taste(u int, i int64) int {
	g := int(s.comm[u])
	if s.o.ShiftAt > 0 && i >= s.o.ShiftAt {
		g = (g + 1) % s.o.Communities
	}
	return g
}

// affinity returns p_u·q_i at event at.
func (s *Scenario) affinity(u, item int, at int64) float64 {
	k := s.k
	c := s.commVec[s.taste(u, at)*k:][:k]
	d := s.userDelta[u*k:][:k]
	q := s.showVec[item*k:][:k]
	var a float64
	for j := range k {
		a += (c[j] + d[j]) * q[j]
	}
	return a
}

// tasteVec writes p_u at event at into the scenario's scratch vector and
// returns it. The sum c + δ is formed exactly as in affinity, so both give
// the same dot products.
func (s *Scenario) tasteVec(u int, at int64) []float64 {
	k := s.k
	c := s.commVec[s.taste(u, at)*k:][:k]
	d := s.userDelta[u*k:][:k]
	p := s.p[:k]
	for j := range k {
		p[j] = c[j] + d[j]
	}
	return p
}

// Expected returns the noise-free rating μ + b_u + b_i + p_u·q_i of listener
// u for show i at event index at (before clipping or rounding). u and i are
// population indices (listener-000123 is 123).
func (s *Scenario) Expected(u, i int, at int64) float64 {
	return s.o.Mean + s.userBias[u] + s.showBias[i] + s.affinity(u, i, at)
}

// generate appends event i to b.
func (s *Scenario) generate(i int64, b *Batch) {
	o := s.o
	s.pcg.Seed(o.Seed, splitmix64(uint64(i)))
	rng := s.rng
	nu := active(o.InitialListeners, o.Listeners, i, o.ArrivalsUntil)
	ni := active(o.InitialShows, o.Shows, i, o.ArrivalsUntil)
	var u, item int
	if nu > active(o.InitialListeners, o.Listeners, i-1, o.ArrivalsUntil) {
		u = nu - 1 // a newcomer's first event
	} else {
		u = rng.IntN(nu)
	}
	newShow := ni > active(o.InitialShows, o.Shows, i-1, o.ArrivalsUntil)
	if newShow {
		item = ni - 1
	}
	value := 1.0
	if o.Implicit {
		if !newShow {
			// Softmax over uniformly drawn candidates (sampling by the
			// cumulative weights; the maximum is subtracted for range).
			m := min(o.Candidates, ni)
			best := math.Inf(-1)
			p := s.tasteVec(u, i)
			for j := range m {
				c := int32(rng.IntN(ni))
				s.cand[j] = c
				q := s.showVec[int(c)*s.k:][:s.k]
				var dot float64
				for x := range q {
					dot += p[x] * q[x]
				}
				a := (s.showBias[c] + dot) / s.temp
				s.weights[j] = a
				best = max(best, a)
			}
			var total float64
			for j := range m {
				s.weights[j] = math.Exp(s.weights[j] - best)
				total += s.weights[j]
			}
			x := rng.Float64() * total
			item = int(s.cand[m-1])
			for j := range m {
				x -= s.weights[j]
				if x < 0 {
					item = int(s.cand[j])
					break
				}
			}
		}
	} else {
		if !newShow {
			item = rng.IntN(ni)
		}
		value = s.Expected(u, item, i) + o.Noise*rng.NormFloat64()
		if o.ClipMax > o.ClipMin {
			value = min(max(value, o.ClipMin), o.ClipMax)
		}
		if o.Step > 0 {
			value = math.Round(value/o.Step) * o.Step
			if o.ClipMax > o.ClipMin {
				value = min(max(value, o.ClipMin), o.ClipMax)
			}
		}
	}
	s.user = appendID(s.user[:0], "listener-", u, 6)
	s.itm = appendID(s.itm[:0], "show-", item, 4)
	s.eid = strconv.AppendInt(append(s.eid[:0], "ev-"...), i, 10)
	ev := b.Add(Event{User: s.user, Item: s.itm, EventID: s.eid, Value: value, Time: s.timeOf(i), Kind: Interaction})
	ev.Offset = i
}

func (s *Scenario) timeOf(i int64) int64 {
	return s.o.Start + int64(float64(i)*1000/s.o.Rate)
}

// appendID appends prefix and n zero-padded to width digits.
func appendID(dst []byte, prefix string, n, width int) []byte {
	dst = append(dst, prefix...)
	var digits [20]byte
	d := strconv.AppendInt(digits[:0], int64(n), 10)
	for range width - len(d) {
		dst = append(dst, '0')
	}
	return append(dst, d...)
}

// ListenerID returns the ID of listener u ("listener-000123").
func ListenerID(u int) string { return string(appendID(nil, "listener-", u, 6)) }

// ShowID returns the ID of show i ("show-0042").
func ShowID(i int) string { return string(appendID(nil, "show-", i, 4)) }

func (s *Scenario) position() Position {
	return Position{Source: "scenario", Seed: s.o.Seed, Offset: s.next}
}

// Next returns the next batch of events, or io.EOF after the last one of a
// finite scenario. The scenario never idles, so batches are never empty.
func (s *Scenario) Next(ctx context.Context) (*Batch, error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	b := &s.batch
	b.Reset()
	n := int64(s.o.BatchSize)
	if s.o.Events > 0 {
		n = min(n, s.o.Events-s.next)
		if n <= 0 {
			return nil, io.EOF
		}
	}
	for range n {
		s.generate(s.next, b)
		s.next++
	}
	b.Pos = s.position()
	return b, nil
}

// Commit checks that p is a position of this scenario; nothing needs
// acknowledging.
func (s *Scenario) Commit(_ context.Context, p Position) error {
	if p.Source != "scenario" || p.Seed != s.o.Seed || p.Offset > s.next {
		return fmt.Errorf("stream: commit to scenario seed %d: foreign position %s", s.o.Seed, p)
	}
	return nil
}

// Close does nothing: a scenario holds no goroutine or file.
func (s *Scenario) Close() error { return nil }

// WriteTo writes the remaining events of a finite scenario to w as JSON
// lines (AppendJSON, one per line) and returns the number of bytes written.
// It implements io.WriterTo; an endless scenario is an error.
func (s *Scenario) WriteTo(w io.Writer) (int64, error) {
	if s.o.Events == 0 {
		return 0, errors.New("stream: scenario: cannot write an endless scenario (set the number of events)")
	}
	bw := bufio.NewWriterSize(w, 64<<10)
	var written int64
	var line []byte
	for s.next < s.o.Events {
		s.batch.Reset()
		s.generate(s.next, &s.batch)
		line = append(AppendJSON(line[:0], &s.batch.Events[0]), '\n')
		n, err := bw.Write(line)
		written += int64(n)
		if err != nil {
			return written, err
		}
		s.next++
	}
	return written, bw.Flush()
}

// Options returns the options in use, with defaults filled in.
func (s *Scenario) Options() ScenarioOptions { return s.o }

// Noise returns σ, the standard deviation of the rating noise: no predictor
// beats RMSE σ in expectation on unclipped, unrounded ratings.
func (s *Scenario) Noise() float64 { return s.o.Noise }

// SignalVariance returns V = SNR·σ², the variance of b_u + b_i + p_u·q_i over
// uniformly drawn listener and show pairs.
func (s *Scenario) SignalVariance() float64 { return s.v }

// ShiftAt returns the index of the first event after the taste shift (0: none).
func (s *Scenario) ShiftAt() int64 { return s.o.ShiftAt }

// ShiftLoss returns the rise in expected squared rating error, after the
// shift, of a predictor that knows the pre-shift truth exactly:
//
//	ΔL = (1/|U||I|) Σ_u Σ_i ((c_{g(u)+1} − c_{g(u)})·q_i)²
//
// averaged uniformly over all listeners and shows (the population drawn
// from once arrivals have ended). It is 0 when there is no shift.
func (s *Scenario) ShiftLoss() float64 {
	if s.o.ShiftAt == 0 {
		return 0
	}
	k, C := s.k, s.o.Communities
	// Per community: mean over shows of (Δc·q)².
	perComm := make([]float64, C)
	diff := make([]float64, k)
	for g := range C {
		h := (g + 1) % C
		for j := range k {
			diff[j] = s.commVec[h*k+j] - s.commVec[g*k+j]
		}
		var sum float64
		for i := range s.o.Shows {
			var d float64
			for j := range k {
				d += diff[j] * s.showVec[i*k+j]
			}
			sum += d * d
		}
		perComm[g] = sum / float64(s.o.Shows)
	}
	var total float64
	for _, g := range s.comm {
		total += perComm[g]
	}
	return total / float64(len(s.comm))
}

// PlantedItems returns copies of the planted vectors q_i of the first n shows
// (n×k); n is capped at the number of shows.
func (s *Scenario) PlantedItems(n int) [][]float64 {
	n = min(n, s.o.Shows)
	out := make([][]float64, n)
	for i := range out {
		out[i] = append([]float64(nil), s.showVec[i*s.k:(i+1)*s.k]...)
	}
	return out
}

// PlantedUsers returns copies of the planted pre-shift tastes p_u of the
// first n listeners (n×k); n is capped at the number of listeners.
func (s *Scenario) PlantedUsers(n int) [][]float64 {
	n = min(n, s.o.Listeners)
	out := make([][]float64, n)
	for u := range out {
		p := make([]float64, s.k)
		g := int(s.comm[u])
		for j := range p {
			p[j] = s.commVec[g*s.k+j] + s.userDelta[u*s.k+j]
		}
		out[u] = p
	}
	return out
}

// Community returns the community of listener u before the shift.
func (s *Scenario) Community(u int) int { return int(s.comm[u]) }
