package online

import (
	"math"
	"math/rand/v2"
	"testing"
)

func randVec(r *rand.Rand, n int) []float32 {
	v := make([]float32, n)
	for f := range v {
		v[f] = float32(r.NormFloat64())
	}
	return v
}

// The fast kernels sum in another order and may fuse multiply-adds, so they
// match the reference loops to rounding, not bit for bit. Bound for a dot
// product of length n in float32 (standard error analysis, common practice):
// |fl(a·b) − a·b| ≤ n·u·Σ|a_f b_f| with u = 2⁻²⁴; we allow 2n·u·Σ|a_f b_f|
// between two such computations.
func TestDotFastMatchesReference(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	t.Logf("fast kernels: %s", fastKernelName)
	for n := 0; n <= 131; n++ {
		for trial := 0; trial < 5; trial++ {
			a, b := randVec(r, n), randVec(r, n)
			var abs float64
			for f := range a {
				abs += math.Abs(float64(a[f]) * float64(b[f]))
			}
			tol := 2*float64(n)*0x1p-24*abs + 1e-30
			ref := dotRef(a, b)
			for name, got := range map[string]float32{"fast": dotFast(a, b), "unrolled": dotUnrolled(a, b)} {
				if d := math.Abs(float64(got) - float64(ref)); d > tol {
					t.Fatalf("n=%d %s dot = %v, reference %v, |diff| %g > tol %g", n, name, got, ref, d, tol)
				}
			}
		}
	}
}

// Each updated value is a·x + b·y: at most two roundings apart between the
// fused and unfused forms, so 4u·(|a x| + |b y|) bounds the difference.
func TestUpdateFastMatchesReference(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	a1, b1, a2, b2 := float32(0.9996), float32(0.013), float32(0.9998), float32(-0.021)
	for n := 1; n <= 131; n++ {
		p0, q0 := randVec(r, n), randVec(r, n)
		for _, fn := range []struct {
			name string
			f    func(p, q []float32, a1, b1, a2, b2 float32) float32
		}{{"fast", updateFast}, {"unrolled", updateUnrolled}} {
			pr, qr := append([]float32(nil), p0...), append([]float32(nil), q0...)
			pf, qf := append([]float32(nil), p0...), append([]float32(nil), q0...)
			if c := updateRef(pr, qr, a1, b1, a2, b2); c != 0 {
				t.Fatalf("reference check = %v for finite values, want 0", c)
			}
			if c := fn.f(pf, qf, a1, b1, a2, b2); c != 0 {
				t.Fatalf("n=%d %s check = %v for finite values, want 0", n, fn.name, c)
			}
			for f := range p0 {
				x, y := float64(p0[f]), float64(q0[f])
				tp := 4 * 0x1p-24 * (math.Abs(float64(a1)*x) + math.Abs(float64(b1)*y))
				tq := 4 * 0x1p-24 * (math.Abs(float64(a2)*y) + math.Abs(float64(b2)*x))
				if d := math.Abs(float64(pf[f] - pr[f])); d > tp {
					t.Fatalf("n=%d %s p[%d] = %v, reference %v", n, fn.name, f, pf[f], pr[f])
				}
				if d := math.Abs(float64(qf[f] - qr[f])); d > tq {
					t.Fatalf("n=%d %s q[%d] = %v, reference %v", n, fn.name, f, qf[f], qr[f])
				}
			}
		}
	}
}

func TestUpdateCheckFlagsOverflow(t *testing.T) {
	for _, n := range []int{3, 8, 17, 64} {
		for _, f := range []func(p, q []float32, a1, b1, a2, b2 float32) float32{updateRef, updateUnrolled, updateFast} {
			p := make([]float32, n)
			q := make([]float32, n)
			p[n-1], q[n-1] = 3e38, 3e38 // a1·p + b1·q overflows float32 (max ≈ 3.4e38)
			if c := f(p, q, 1, 1, 1, 1); c == 0 {
				t.Fatalf("n=%d: check = 0 after an overflow, want NaN", n)
			}
		}
	}
	if c := finiteCheck([]float32{1, float32(math.NaN())}); c == 0 {
		t.Fatal("finiteCheck missed a NaN")
	}
	if c := finiteCheck([]float32{1, -3e38, 0}); c != 0 {
		t.Fatalf("finiteCheck = %v for finite values", c)
	}
}

// dotBound must agree with its definition on the dot product (to the
// rounding bound above) and be sound on the flag: a variant may call a row
// "not small" that the definition calls small (dotBoundUnrolled tests
// |x| ≤ 1e17 rather than x² ≤ 1e36), never the reverse, and ordinary rows
// (all |x| ≤ 1e16 here) must be small for every variant.
func TestDotBoundMatchesReference(t *testing.T) {
	r := rand.New(rand.NewPCG(9, 10))
	bigs := []float32{0, 1e16, -1e16, 2e18, -2e18, 1e18, float32(math.Inf(1)), float32(math.NaN()), 3e38}
	for n := 0; n <= 131; n++ {
		for trial, big := range bigs {
			a, b := randVec(r, n), randVec(r, n)
			ordinary := big == 0 || big == 1e16 || big == -1e16
			if n > 0 && big != 0 {
				if trial%2 == 0 {
					a[r.IntN(n)] = big
				} else {
					b[r.IntN(n)] = big
				}
			}
			ref, refSmall := dotBoundRef(a, b)
			if want := n == 0 || ordinary || big == 1e18; refSmall != want {
				t.Fatalf("n=%d big %v: reference small = %v, want %v", n, big, refSmall, want)
			}
			var abs float64
			for f := range a {
				abs += math.Abs(float64(a[f]) * float64(b[f]))
			}
			tol := 2*float64(n)*0x1p-24*abs + 1e-30
			for name, f := range map[string]func(a, b []float32) (float32, bool){"fast": dotBoundFast, "unrolled": dotBoundUnrolled} {
				got, small := f(a, b)
				if small && !refSmall {
					t.Fatalf("n=%d big %v %s: small, but not by the definition", n, big, name)
				}
				if ordinary && !small && (name != "fast" || fastBounded) {
					t.Fatalf("n=%d big %v %s: ordinary rows reported not small", n, big, name)
				}
				if !small {
					continue // the dot of huge or non-finite rows is not compared
				}
				if d := math.Abs(float64(got) - float64(ref)); d > tol {
					t.Fatalf("n=%d %s dot = %v, reference %v, |diff| %g > tol %g", n, name, got, ref, d, tol)
				}
			}
		}
	}
}

// updateFree is update without the check: the same values.
func TestUpdateFreeMatchesUpdate(t *testing.T) {
	r := rand.New(rand.NewPCG(11, 12))
	for n := 1; n <= 131; n++ {
		p0, q0 := randVec(r, n), randVec(r, n)
		pa, qa := append([]float32(nil), p0...), append([]float32(nil), q0...)
		pb, qb := append([]float32(nil), p0...), append([]float32(nil), q0...)
		updateFast(pa, qa, 0.9996, 0.013, 0.9998, -0.021)
		updateFreeFast(pb, qb, 0.9996, 0.013, 0.9998, -0.021)
		if !sameBits(pa, pb) || !sameBits(qa, qb) {
			t.Fatalf("n=%d: updateFreeFast differs from updateFast", n)
		}
	}
}

// Touch only starts loads: it must change no row, accept rows out of range,
// and (on amd64, where it prefetches) reach the last row of a chunk and the
// last metadata entry without faulting.
func TestTouchChangesNothing(t *testing.T) {
	for _, k := range []int{1, 5, 16, 64} {
		m, err := New(Options{Rank: k, Seed: 3})
		if err != nil {
			t.Fatal(err)
		}
		for s := range m.tab {
			for range chunkRows {
				r := m.tab[s].alloc()
				m.initRow(Side(s), m.tab[s].row(r), []byte{byte(r), byte(r >> 8)})
			}
		}
		before := [2][]float32{}
		for s := range m.tab {
			before[s] = append([]float32(nil), m.tab[s].vec[0]...)
		}
		for _, r := range []int32{-1, 0, 1, chunkRows - 1, chunkRows, 1 << 30} {
			m.Touch(r, chunkRows-1-r)
			m.Touch(r, r)
		}
		for s := range m.tab {
			if !sameBits(before[s], m.tab[s].vec[0]) {
				t.Fatalf("k=%d: Touch changed %s rows", k, Side(s))
			}
		}
		if m.sink-m.sink != 0 {
			t.Fatalf("k=%d: Touch's sum is not finite: %v", k, m.sink)
		}
	}
}
