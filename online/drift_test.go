package online

import (
	"math"
	"math/rand/v2"
	"testing"
)

// phReference is a straightforward float64 evaluation of the Page-Hinkley
// recurrence written in the PageHinkley doc comment (x̄_t includes x_t,
// M_t = min(m_1…m_t)), independent of the detector's incremental mean and
// compensated sum. It returns the first alarm step (1-based) or 0.
func phReference(xs []float64, delta, lambda float64, nmin int) int {
	var sum, m float64
	minM := math.Inf(1)
	for i, x := range xs {
		t := i + 1
		sum += x
		m += x - sum/float64(t) - delta
		minM = math.Min(minM, m)
		if t >= nmin && m-minM > lambda {
			return t
		}
	}
	return 0
}

// phFirstAlarm feeds xs to a fresh detector and returns the first alarm step
// (1-based) or 0.
func phFirstAlarm(xs []float64, delta, lambda float64, nmin int) int {
	p := NewPageHinkley(delta, lambda, nmin)
	for i, x := range xs {
		if p.Add(x) {
			return i + 1
		}
	}
	return 0
}

func steps(a float64, na int, b float64, nb int) []float64 {
	xs := make([]float64, 0, na+nb)
	for range na {
		xs = append(xs, a)
	}
	for range nb {
		xs = append(xs, b)
	}
	return xs
}

func TestPageHinkleyCheckValues(t *testing.T) {
	// Check values from /work/shared/REFERENCES.md, "computed" from the
	// recurrence with δ = 0.005, λ = 50, n_min = 30 and no fading; recomputed
	// here by phReference too. Our variant: x̄_t includes the current sample.
	tests := []struct {
		name string
		xs   []float64
		want int
	}{
		{"1000 zeros then ones", steps(0, 1000, 1, 2000), 1052},
		{"0.2 for 5000 then 0.5", steps(0.2, 5000, 0.5, 5000), 5173},
		{"constant 0.3 for 100000", steps(0.3, 100_000, 0, 0), 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if ref := phReference(tt.xs, 0.005, 50, 30); ref != tt.want {
				t.Errorf("reference loop alarms at %d, REFERENCES.md says %d", ref, tt.want)
			}
			if got := phFirstAlarm(tt.xs, 0.005, 50, 30); got != tt.want {
				t.Errorf("first alarm at %d, want %d", got, tt.want)
			}
		})
	}
}

func TestPageHinkleyConstantNeverAlarms(t *testing.T) {
	// For a constant stream x_t − x̄_t = 0, so m_t = −δt is its own minimum
	// and m_t − M_t = 0 (fact of the recurrence). Any constant, also with
	// δ = 0 and the smallest n_min.
	rng := rand.New(rand.NewPCG(7, 8))
	consts := []float64{0, 1, 0.3, 1.0 / 3, 1e-300, 0.999999999}
	for range 4 {
		consts = append(consts, rng.Float64())
	}
	for _, c := range consts {
		for _, delta := range []float64{0, 0.005} {
			p := NewPageHinkley(delta, 50, 1)
			maxStat := 0.0
			for i := range 100_000 {
				if p.Add(c) {
					t.Fatalf("constant %v, δ %v: alarm at %d", c, delta, i+1)
				}
				maxStat = math.Max(maxStat, p.Stat())
			}
			if maxStat != 0 {
				t.Errorf("constant %v, δ %v: statistic reached %g, want 0", c, delta, maxStat)
			}
		}
	}
}

func TestPageHinkleyResetsAfterAlarm(t *testing.T) {
	// After the alarm at 1052 the test restarts on a stream of ones: a
	// constant, so no second alarm (see TestPageHinkleyConstantNeverAlarms).
	p := NewPageHinkley(0.005, 50, 30)
	alarms := 0
	for i, x := range steps(0, 1000, 1, 20_000) {
		if p.Add(x) {
			alarms++
			if p.Len() != 0 || p.Stat() != 0 {
				t.Fatalf("after the alarm at %d: Len %d Stat %v, want 0, 0", i+1, p.Len(), p.Stat())
			}
		}
	}
	if alarms != 1 {
		t.Errorf("%d alarms, want 1", alarms)
	}
	// The statistic just before the alarm exceeds λ, just after it is 0;
	// before the change it stays 0 (constant zeros).
	q := NewPageHinkley(0.005, 50, 30)
	for i, x := range steps(0, 1000, 1, 51) {
		q.Add(x)
		if i < 1000 && q.Stat() != 0 {
			t.Fatalf("statistic %v at %d on zeros", q.Stat(), i+1)
		}
	}
	if s := q.Stat(); !(s <= 50 && s > 45) {
		t.Errorf("statistic at 1051 = %v, want just under λ = 50", s)
	}
}

func TestADWINCut(t *testing.T) {
	// REFERENCES.md check values for δ = 0.002 (rounded to 4 decimals, hence
	// the 5e-5 tolerance).
	tests := []struct {
		n0, n1 int
		want   float64
	}{
		{500, 500, 0.1703},
		{5000, 5000, 0.0580},
	}
	for _, tt := range tests {
		got := ADWINCut(tt.n0, tt.n1, 0.002)
		if math.Abs(got-tt.want) > 5e-5 {
			t.Errorf("ε_cut(%d, %d) = %.5f, want %.4f", tt.n0, tt.n1, got, tt.want)
		}
		// The formula written out (Bifet & Gavaldà 2007): m = 1/(1/n0+1/n1),
		// δ' = δ/n, sqrt(ln(4/δ')/(2m)).
		m := 1 / (1/float64(tt.n0) + 1/float64(tt.n1))
		d := 0.002 / float64(tt.n0+tt.n1)
		if f := math.Sqrt(math.Log(4/d) / (2 * m)); math.Abs(got-f) > 1e-14 {
			t.Errorf("ε_cut(%d, %d) = %v, formula gives %v", tt.n0, tt.n1, got, f)
		}
	}
	if !math.IsInf(ADWINCut(0, 10, 0.002), 1) {
		t.Error("ε_cut with an empty part is not +Inf")
	}
	// Symmetric in n0, n1; falls as the parts grow.
	if ADWINCut(100, 300, 0.002) != ADWINCut(300, 100, 0.002) || ADWINCut(100, 300, 0.002) <= ADWINCut(1000, 3000, 0.002) {
		t.Error("ε_cut not symmetric or not decreasing")
	}
}

func bernoulli(rng *rand.Rand, p float64) float64 {
	if rng.Float64() < p {
		return 1
	}
	return 0
}

func TestADWINDetectsStepNotStationary(t *testing.T) {
	// Seeded Bernoulli streams. A step from p = 0.2 to 0.5 after 5000
	// samples must be detected soon after the step (the shift is 0.3; ε_cut
	// for parts of 5000 and 200 is about 0.2, so a few hundred samples
	// suffice, plus up to 31 for the check clock), and the window then
	// holds mostly the new regime. A stationary p = 0.3 stream of 200,000
	// samples must give no detection: δ = 0.002 bounds the false alarm
	// probability per check, and Hoeffding's bound is conservative.
	rng := rand.New(rand.NewPCG(9, 10))
	a := NewADWIN(0.002)
	first := 0
	for i := range 10_000 {
		p := 0.2
		if i >= 5000 {
			p = 0.5
		}
		if a.Add(bernoulli(rng, p)) && first == 0 {
			first = i + 1
		}
	}
	if first <= 5000 || first > 5600 {
		t.Errorf("step at 5000: first detection at %d, want in (5000, 5600]", first)
	}
	if w := a.Width(); w > 5500 {
		t.Errorf("window after the step holds %d samples, want it cut near the step (≤ 5500)", w)
	}
	if m := a.Mean(); math.Abs(m-0.5) > 0.05 {
		t.Errorf("window mean after the step %v, want about 0.5", m)
	}

	s := NewADWIN(0.002)
	for i := range 200_000 {
		if s.Add(bernoulli(rng, 0.3)) {
			t.Fatalf("stationary stream: detection at %d (width %d)", i+1, s.Width())
		}
	}
	if s.Width() != 200_000 {
		t.Errorf("stationary window holds %d samples, want all 200000", s.Width())
	}
}

func TestADWINWindowIsSuffix(t *testing.T) {
	// Invariant of the exponential histogram: the window is always the
	// newest Width samples, and its mean is theirs. Checked against the kept
	// history on a stream with several changes.
	rng := rand.New(rand.NewPCG(11, 12))
	a := NewADWIN(0.002)
	var hist []float64
	for i := range 60_000 {
		p := []float64{0.1, 0.6, 0.3, 0.9}[(i/15_000)%4]
		x := bernoulli(rng, p)
		hist = append(hist, x)
		a.Add(x)
		if i%101 != 0 {
			continue
		}
		w := int(a.Width())
		if w > len(hist) || w < 1 {
			t.Fatalf("step %d: width %d", i, w)
		}
		var s float64
		for _, v := range hist[len(hist)-w:] {
			s += v
		}
		// Sums of 0/1 samples are exact in float64.
		if got := a.Mean(); got != s/float64(w) {
			t.Fatalf("step %d: window mean %v, mean of the newest %d samples %v", i, got, w, s/float64(w))
		}
	}
}

func TestADWINStateRoundTrip(t *testing.T) {
	rng := rand.New(rand.NewPCG(13, 14))
	a := NewADWIN(0.002)
	for range 7777 {
		a.Add(rng.Float64())
	}
	st := a.state()
	if r := checkADWINState(st); r != "" {
		t.Fatalf("live state rejected: %s", r)
	}
	b := NewADWIN(0.002)
	b.setState(st)
	for i := range 20_000 {
		x := rng.Float64() * 0.5
		if i > 10_000 {
			x += 0.5
		}
		da, db := a.Add(x), b.Add(x)
		if da != db || a.Width() != b.Width() || a.Mean() != b.Mean() {
			t.Fatalf("restored detector diverged at %d", i)
		}
	}
}

func TestDetectorsDoNotAllocate(t *testing.T) {
	p := NewPageHinkley(0.005, 50, 30)
	a := NewADWIN(0.002)
	rng := rand.New(rand.NewPCG(15, 16))
	if n := testing.AllocsPerRun(5000, func() { p.Add(rng.Float64()) }); n != 0 {
		t.Errorf("PageHinkley.Add allocates %.0f times per call", n)
	}
	if n := testing.AllocsPerRun(5000, func() { a.Add(rng.Float64()) }); n != 0 {
		t.Errorf("ADWIN.Add allocates %.0f times per call", n)
	}
}

func BenchmarkADWINAdd(b *testing.B) {
	a := NewADWIN(0.002)
	rng := rand.New(rand.NewPCG(1, 1))
	for b.Loop() {
		a.Add(bernoulli(rng, 0.3))
	}
}

func BenchmarkPageHinkleyAdd(b *testing.B) {
	p := NewPageHinkley(0.005, 50, 30)
	rng := rand.New(rand.NewPCG(1, 1))
	for b.Loop() {
		p.Add(rng.Float64())
	}
}
