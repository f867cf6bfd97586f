package online

import (
	"math"
	"math/big"
	"math/rand/v2"
	"testing"
)

func TestNeumaier(t *testing.T) {
	// 1 + 1e100 + 1 − 1e100 = 2 exactly; plain float64 summation gives 0.
	// A standard demonstration of Neumaier's improvement over Kahan (common
	// practice).
	var k Neumaier
	for _, x := range []float64{1, 1e100, 1, -1e100} {
		k.Add(x)
	}
	if got := k.Value(); got != 2 {
		t.Errorf("Neumaier sum = %v, want 2", got)
	}

	// Against an exact big.Float sum of a million terms of mixed magnitude
	// and sign. Neumaier's error bound is about 2ε|Σx| + O(nε²)Σ|x|; allow
	// 4ε relative to Σ|x| (common practice: a few units of round-off).
	rng := rand.New(rand.NewPCG(1, 2))
	var exact big.Float
	exact.SetPrec(2000)
	var plain, abs float64
	k = Neumaier{}
	for range 1_000_000 {
		x := (rng.Float64() - 0.5) * math.Pow(10, float64(rng.IntN(12)))
		k.Add(x)
		plain += x
		abs += math.Abs(x)
		exact.Add(&exact, new(big.Float).SetFloat64(x))
	}
	want, _ := exact.Float64()
	if err := math.Abs(k.Value() - want); err > 4*0x1p-52*math.Abs(want)+1e-30*abs {
		t.Errorf("Neumaier sum off by %g (sum %g), plain summation off by %g", err, want, math.Abs(plain-want))
	}
}

func TestFadingCheckValues(t *testing.T) {
	// Loss 1 for steps 1…1000, then 0, α = 0.995. Check values from
	// /work/shared/REFERENCES.md ("computed" from the recurrence of Gama,
	// Sebastião & Rodrigues 2013): P(1100) = 0.604175, P(1500) = 0.081073,
	// and the closed form of the same recurrence,
	//   P_t = α^(t−1000) (1 − α^1000) / (1 − α^t)  for t ≥ 1000.
	const alpha = 0.995
	f := NewFading(alpha)
	want := map[int]float64{1100: 0.604175, 1500: 0.081073}
	for step := 1; step <= 1500; step++ {
		l := 0.0
		if step <= 1000 {
			l = 1
		}
		f.Add(l)
		if w, ok := want[step]; ok {
			// The reference values are given to 6 decimals.
			if got := f.Mean(); math.Abs(got-w) > 1e-6 {
				t.Errorf("P(%d) = %.7f, want %.6f", step, got, w)
			}
		}
		if step >= 1000 {
			closed := math.Pow(alpha, float64(step-1000)) * (1 - math.Pow(alpha, 1000)) / (1 - math.Pow(alpha, float64(step)))
			// Two float64 evaluations of the same quantity: 1e-12 covers
			// the round-off of 1500 multiply-adds and of math.Pow.
			if got := f.Mean(); math.Abs(got-closed) > 1e-12 {
				t.Fatalf("P(%d) = %.15f, closed form %.15f", step, got, closed)
			}
		}
	}
	if got, want := f.Weight(), (1-math.Pow(alpha, 1500))/(1-alpha); math.Abs(got-want) > 1e-9 {
		t.Errorf("N(1500) = %v, want %v", got, want)
	}
	var empty Fading
	if empty.Mean() != 0 {
		t.Errorf("empty fading mean = %v, want 0", empty.Mean())
	}
}

func TestWindowMatchesNaive(t *testing.T) {
	// Signed values of very different sizes stress the running totals that
	// add the new value and subtract the evicted one. Reference: naive
	// compensated sums over the last w values of the kept history.
	rng := rand.New(rand.NewPCG(3, 4))
	for _, size := range []int{1, 7, 1000} {
		w := NewWindow(size)
		var hist []float64
		for i := range 300_000 {
			x := (rng.Float64() - 0.3) * math.Pow(10, float64(rng.IntN(9)-4))
			w.Add(x)
			hist = append(hist, x)
			if i%89 != 0 && i < 299_990 {
				continue
			}
			lo := max(0, len(hist)-size)
			var s, q, a Neumaier
			for _, x := range hist[lo:] {
				s.Add(x)
				q.Add(x * x)
				a.Add(math.Abs(x))
			}
			n := float64(len(hist) - lo)
			if w.Len() != len(hist)-lo {
				t.Fatalf("size %d step %d: Len %d, want %d", size, i, w.Len(), len(hist)-lo)
			}
			// Each running total is off by at most a few roundings of the
			// largest term that passed through since the last exact
			// recomputation (|x| ≤ 1e4, x² ≤ 1e8), i.e. about 1e-12 resp.
			// 1e-8 absolute, over at least one value. Tolerance: 1e-9
			// relative to the mean of |x| (resp. x²), plus 1e-9 absolute.
			check := func(what string, got, want, scale, tol float64) {
				if math.Abs(got-want) > tol*(scale+1) {
					t.Fatalf("size %d step %d: window %s %.17g, naive %.17g", size, i, what, got, want)
				}
			}
			check("mean", w.Mean(), s.Value()/n, a.Value()/n, 1e-9)
			check("mean abs", w.MeanAbs(), a.Value()/n, a.Value()/n, 1e-9)
			check("mean square", w.MeanSquare(), q.Value()/n, q.Value()/n, 1e-9)
		}
	}
}

func TestWindowStateRoundTrip(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	a := NewWindow(50)
	for range 133 {
		a.Add(rng.Float64())
	}
	st := a.state()
	if r := checkWindowState(st); r != "" {
		t.Fatalf("state of a live window rejected: %s", r)
	}
	b := NewWindow(50)
	b.setState(st)
	for range 200 {
		x := rng.Float64()
		a.Add(x)
		b.Add(x)
		if a.Mean() != b.Mean() || a.Len() != b.Len() {
			t.Fatalf("restored window diverged: %v vs %v", b.Mean(), a.Mean())
		}
	}

	// Restoring into a smaller window keeps the newest losses.
	c := NewWindow(10)
	c.setState(a.state())
	vals := a.valuesTo(nil)
	var want Neumaier
	for _, x := range vals[len(vals)-10:] {
		want.Add(x)
	}
	if got := c.Mean(); math.Abs(got-want.Value()/10) > 1e-15 {
		t.Errorf("shrunk window mean %v, want %v", got, want.Value()/10)
	}
	// And into a larger one keeps them all.
	d := NewWindow(80)
	d.setState(a.state())
	if d.Len() != 50 || math.Abs(d.Mean()-a.Mean()) > 1e-15 {
		t.Errorf("grown window: len %d mean %v, want 50, %v", d.Len(), d.Mean(), a.Mean())
	}
}

func TestWindowAddDoesNotAllocate(t *testing.T) {
	w := NewWindow(64)
	if n := testing.AllocsPerRun(1000, func() { w.Add(0.5) }); n != 0 {
		t.Errorf("Window.Add allocates %.0f times per call, want 0", n)
	}
}
