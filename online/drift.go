package online

import (
	"math"
	"strconv"
)

// This file holds the two drift detectors the Monitor runs on a stream of
// losses in [0, 1]: Page-Hinkley and ADWIN. Both are pure: no clock, no
// randomness, no allocation per sample.

// PageHinkley is the Page-Hinkley test (E. S. Page, "Continuous inspection
// schemes", Biometrika 41(1/2), 1954) as used on the error stream of an online
// learner, detecting an increase of the mean loss:
//
//	x̄_t = (1/t) Σ_{i=1}^{t} x_i          (the mean includes the current sample)
//	m_t = m_{t−1} + (x_t − x̄_t − δ),     m_0 = 0
//	M_t = min(m_1, …, m_t)
//	alarm at t  when  t ≥ n_min  and  m_t − M_t > λ
//
// δ is the magnitude of change tolerated and λ the alarm threshold. x̄_t is
// kept in the incremental form x̄_t = x̄_{t−1} + (x_t − x̄_{t−1})/t, which is
// exact for a constant stream (so a constant stream never moves m_t − M_t off
// zero), and m_t is a compensated sum. After an alarm the test restarts from
// t = 0 (mean, m and M forgotten), so it learns the new level of the loss and
// raises a further alarm only on a further increase.
//
// The zero value is not usable; use NewPageHinkley.
type PageHinkley struct {
	delta, lambda float64
	minSamples    int

	t    int64
	mean float64
	m    Neumaier
	min  float64
}

// NewPageHinkley returns a test with tolerance delta ≥ 0, threshold
// lambda > 0 and minimum sample count minSamples ≥ 1. It panics on other
// values (a programmer error; Monitor validates its options first).
func NewPageHinkley(delta, lambda float64, minSamples int) *PageHinkley {
	if !(delta >= 0) || !(lambda > 0) || minSamples < 1 || math.IsInf(delta, 0) || math.IsInf(lambda, 0) {
		panic("online: Page-Hinkley parameters out of range")
	}
	return &PageHinkley{delta: delta, lambda: lambda, minSamples: minSamples}
}

// Add feeds sample x and reports whether the test alarms at this sample. On an
// alarm the test restarts (see PageHinkley). x must be finite.
func (p *PageHinkley) Add(x float64) (alarm bool) {
	p.t++
	p.mean += (x - p.mean) / float64(p.t)
	p.m.Add(x - p.mean - p.delta)
	m := p.m.Value()
	if p.t == 1 || m < p.min {
		p.min = m
	}
	if p.t >= int64(p.minSamples) && m-p.min > p.lambda {
		p.Reset()
		return true
	}
	return false
}

// Stat returns the current statistic m_t − M_t (0 before any sample and just
// after an alarm). It is compared with λ.
func (p *PageHinkley) Stat() float64 {
	if p.t == 0 {
		return 0
	}
	return p.m.Value() - p.min
}

// Len returns t, the number of samples since the start or the last alarm.
func (p *PageHinkley) Len() int64 { return p.t }

// Lambda returns the alarm threshold λ.
func (p *PageHinkley) Lambda() float64 { return p.lambda }

// Reset forgets every sample.
func (p *PageHinkley) Reset() {
	p.t, p.mean, p.m, p.min = 0, 0, Neumaier{}, 0
}

// phState is the stored form of a PageHinkley.
type phState struct {
	T    int64    `json:"t"`
	Mean float64  `json:"mean"`
	M    Neumaier `json:"m"`
	Min  float64  `json:"min"`
}

func (p *PageHinkley) state() phState { return phState{T: p.t, Mean: p.mean, M: p.m, Min: p.min} }
func (p *PageHinkley) setState(st phState) {
	p.t, p.mean, p.m, p.min = st.T, st.Mean, st.M, st.Min
}

// ADWINCut returns the ADWIN cut threshold of A. Bifet and R. Gavaldà,
// "Learning from time-changing data with adaptive windowing", SDM 2007, for a
// window of n = n0 + n1 samples split into an older part of n0 and a newer
// part of n1:
//
//	m     = 1 / (1/n0 + 1/n1)     (the paper's "harmonic mean" of n0 and n1)
//	δ'    = δ / n
//	ε_cut = sqrt( (1/(2m)) · ln(4/δ') )
//
// Two sub-window means that differ by more than ε_cut are taken as evidence
// of change with confidence 1 − δ (Hoeffding's bound, samples in [0, 1]). It
// returns +Inf when n0 or n1 is below 1.
func ADWINCut(n0, n1 int, delta float64) float64 {
	if n0 < 1 || n1 < 1 {
		return math.Inf(1)
	}
	return adwinCut(float64(n0), float64(n1), math.Log(4*float64(n0+n1)/delta))
}

// adwinCut is ADWINCut with ln(4/δ') = ln(4n/δ) computed by the caller.
func adwinCut(n0, n1, logTerm float64) float64 {
	m := 1 / (1/n0 + 1/n1)
	return math.Sqrt(logTerm / (2 * m))
}

const (
	// adwinM is the most buckets of one size the exponential histogram keeps
	// (the paper's parameter M); a level that reaches adwinM+1 merges its two
	// oldest buckets into one of the next size.
	adwinM = 5
	// adwinLevels bounds the bucket sizes to 2^0 … 2^(adwinLevels−1)
	// samples: a window of up to about adwinM · 2^adwinLevels samples, far
	// beyond any stream. At that size the oldest bucket is dropped.
	adwinLevels = 48
	// adwinClock is how many samples pass between two cut checks; the paper
	// checks at every sample, which costs O(log W) square roots each time.
	// Checking every 32 samples delays a detection by at most 31 samples.
	adwinClock = 32
	// adwinMinSub is the fewest samples either sub-window must hold before a
	// cut between them is considered.
	adwinMinSub = 5
)

// adwinLevel holds the buckets of one size, oldest first: sums[i] is the sum
// of the samples of bucket i.
type adwinLevel struct {
	n    int
	sums [adwinM + 1]float64
}

// ADWIN is the ADWIN2 change detector of Bifet and Gavaldà (SDM 2007): an
// adaptive window of recent samples in [0, 1], stored as an exponential
// histogram (buckets of 2^i samples, at most M = 5 of each size, so memory
// and time per check are O(M log W)). At every check, every split of the
// window at a bucket boundary into an older part W0 (n0 samples, mean μ0) and
// a newer part W1 (n1, μ1) is tested, and while some split has
//
//	|μ0 − μ1| > ε_cut(n0, n1)     (see ADWINCut)
//
// the oldest bucket is dropped. A sample after which the window shrank is a
// detection. Checks run every 32 samples (see adwinClock). The window mean is
// recomputed from the bucket sums at each check, so no running total drifts.
//
// The zero value is not usable; use NewADWIN.
type ADWIN struct {
	delta  float64
	levels [adwinLevels]adwinLevel
	top    int   // highest level holding a bucket, −1 when empty
	width  int64 // samples in the window
	total  float64
	clock  int
}

// NewADWIN returns an empty detector with confidence parameter delta in
// (0, 1). It panics on other values (a programmer error; Monitor validates
// its options first).
func NewADWIN(delta float64) *ADWIN {
	if !(delta > 0 && delta < 1) {
		panic("online: ADWIN delta outside (0, 1)")
	}
	return &ADWIN{delta: delta, top: -1}
}

// Add appends sample x (finite, in [0, 1] for the bound to hold) and reports
// whether the window shrank, that is whether change was detected.
func (a *ADWIN) Add(x float64) (drift bool) {
	a.insert(x)
	a.clock++
	if a.clock < adwinClock {
		return false
	}
	a.clock = 0
	return a.check()
}

// insert adds x as a new bucket of size 1 and restores the histogram's
// invariant: at most adwinM buckets of each size.
func (a *ADWIN) insert(x float64) {
	a.width++
	a.total += x
	a.push(0, x)
	if a.top < 0 {
		a.top = 0
	}
	for i := 0; i < adwinLevels; i++ {
		lv := &a.levels[i]
		if lv.n <= adwinM {
			break
		}
		merged := lv.sums[0] + lv.sums[1]
		copy(lv.sums[:], lv.sums[2:lv.n])
		lv.n -= 2
		if i+1 == adwinLevels {
			// No larger size: the merged bucket is the oldest of all; drop it.
			a.width -= 2 << i
			a.total -= merged
			continue
		}
		a.push(i+1, merged)
		if i+1 > a.top {
			a.top = i + 1
		}
	}
}

func (a *ADWIN) push(level int, sum float64) {
	lv := &a.levels[level]
	lv.sums[lv.n] = sum
	lv.n++
}

// check drops oldest buckets while some split shows a cut, and reports
// whether it dropped any.
func (a *ADWIN) check() bool {
	a.recount()
	dropped := false
	for a.cutExists() {
		a.dropOldest()
		dropped = true
	}
	return dropped
}

// recount recomputes the window total from the buckets (ages do not matter:
// every sample is counted once).
func (a *ADWIN) recount() {
	var s Neumaier
	for i := 0; i <= a.top; i++ {
		lv := &a.levels[i]
		for j := 0; j < lv.n; j++ {
			s.Add(lv.sums[j])
		}
	}
	a.total = s.Value()
}

// cutExists reports whether some bucket boundary splits the window into two
// parts whose means differ by more than ε_cut. It walks from the oldest
// bucket (the first of the highest level) to the newest.
func (a *ADWIN) cutExists() bool {
	if a.width < 2*adwinMinSub {
		return false
	}
	n := float64(a.width)
	logTerm := math.Log(4 * n / a.delta)
	var n0, s0 float64
	for i := a.top; i >= 0; i-- {
		lv := &a.levels[i]
		size := float64(int64(1) << i)
		for j := 0; j < lv.n; j++ {
			n0 += size
			s0 += lv.sums[j]
			n1 := n - n0
			if n1 < adwinMinSub {
				return false
			}
			if n0 < adwinMinSub {
				continue
			}
			// |μ0 − μ1| > ε_cut, squared and multiplied out (μ0 = s0/n0,
			// μ1 = s1/n1, ε_cut² = ln(4/δ')·n/(2·n0·n1)) to avoid a square
			// root and two divisions per boundary:
			//   2 (s0·n1 − s1·n0)² > ln(4/δ') · n0 · n1 · n
			d := s0*n1 - (a.total-s0)*n0
			if 2*d*d > logTerm*n0*n1*n {
				return true
			}
		}
	}
	return false
}

// dropOldest removes the oldest bucket.
func (a *ADWIN) dropOldest() {
	lv := &a.levels[a.top]
	a.width -= int64(1) << a.top
	a.total -= lv.sums[0]
	copy(lv.sums[:], lv.sums[1:lv.n])
	lv.n--
	for a.top >= 0 && a.levels[a.top].n == 0 {
		a.top--
	}
}

// Width returns the number of samples in the window.
func (a *ADWIN) Width() int64 { return a.width }

// Mean returns the mean of the window, or 0 when it is empty.
func (a *ADWIN) Mean() float64 {
	if a.width == 0 {
		return 0
	}
	return a.total / float64(a.width)
}

// adwinState is the stored form of an ADWIN: the bucket sums per level,
// oldest first.
type adwinState struct {
	Levels [][]float64 `json:"levels"`
	Total  float64     `json:"total"`
	Clock  int         `json:"clock"`
}

func (a *ADWIN) state() adwinState {
	st := adwinState{Total: a.total, Clock: a.clock, Levels: make([][]float64, a.top+1)}
	for i := 0; i <= a.top; i++ {
		lv := &a.levels[i]
		st.Levels[i] = append([]float64{}, lv.sums[:lv.n]...)
	}
	return st
}

// checkADWINState reports what is wrong with st, or "" when it is usable.
func checkADWINState(st adwinState) string {
	if len(st.Levels) > adwinLevels {
		return "too many levels"
	}
	for i, l := range st.Levels {
		if len(l) > adwinM {
			return "too many buckets at level " + strconv.Itoa(i)
		}
		for _, s := range l {
			if s < 0 || s > float64(int64(1)<<i) {
				return "bucket sum out of range at level " + strconv.Itoa(i)
			}
		}
	}
	var width float64
	for i, l := range st.Levels {
		width += float64(len(l)) * float64(int64(1)<<i)
	}
	if !(st.Total >= -1e-9 && st.Total <= width*(1+1e-12)) {
		return "total out of range"
	}
	if st.Clock < 0 || st.Clock >= adwinClock {
		return "clock out of range"
	}
	return ""
}

// setState restores a from st, which checkADWINState accepted.
func (a *ADWIN) setState(st adwinState) {
	a.levels = [adwinLevels]adwinLevel{}
	a.top, a.width = -1, 0
	for i, l := range st.Levels {
		a.levels[i].n = copy(a.levels[i].sums[:], l)
		if len(l) > 0 {
			a.top = i
		}
		a.width += int64(len(l)) << i
	}
	a.total, a.clock = st.Total, st.Clock
}
