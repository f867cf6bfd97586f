package online

import "math"

// The inner loops of a step. Each has a reference variant (a plain loop, the
// definition) and a fast variant selected at build time: kernel_simd.go (AVX2
// with FMA, GOEXPERIMENT=simd on amd64) or kernel_generic.go (the unrolled
// portable loops below). Fast and reference results agree to rounding: the
// fast variants sum in a different order and may fuse multiply-adds.

// dotRef returns Σ_f a[f]·b[f]. len(b) must be at least len(a).
func dotRef(a, b []float32) float32 {
	b = b[:len(a)]
	var s float32
	for f, x := range a {
		s += x * b[f]
	}
	return s
}

// updateRef applies the fused two-vector SGD update in place, both sides
// reading the pre-step values:
//
//	p[f], q[f] ← a1·p[f] + b1·q[f],  a2·q[f] + b2·p[f]
//
// With a1 = 1 − γ_u·λ, b1 = γ_u·e, a2 = 1 − γ_i·λ, b2 = γ_i·e this is the
// regularized step p ← p + γ_u(e·q − λ·p), q ← q + γ_i(e·p − λ·q) of Koren,
// Bell & Volinsky (2009). It returns Σ (p'−p') + (q'−q'), which is 0 when
// every new value is finite and NaN otherwise: the finiteness check costs
// one subtraction and one addition per value.
func updateRef(p, q []float32, a1, b1, a2, b2 float32) float32 {
	q = q[:len(p)]
	var chk float32
	for f, x := range p {
		y := q[f]
		np := a1*x + b1*y
		nq := a2*y + b2*x
		p[f], q[f] = np, nq
		chk += (np - np) + (nq - nq)
	}
	return chk
}

// dotUnrolled is dotRef with four independent accumulators, so the adds
// of consecutive elements do not wait on each other.
func dotUnrolled(a, b []float32) float32 {
	b = b[:len(a)]
	var s0, s1, s2, s3 float32
	f := 0
	for ; f+4 <= len(a); f += 4 {
		aa := a[f : f+4 : f+4]
		bb := b[f : f+4 : f+4]
		s0 += aa[0] * bb[0]
		s1 += aa[1] * bb[1]
		s2 += aa[2] * bb[2]
		s3 += aa[3] * bb[3]
	}
	for ; f < len(a); f++ {
		s0 += a[f] * b[f]
	}
	return (s0 + s1) + (s2 + s3)
}

// updateUnrolled is updateRef unrolled by four.
func updateUnrolled(p, q []float32, a1, b1, a2, b2 float32) float32 {
	q = q[:len(p)]
	var c0, c1 float32
	f := 0
	for ; f+4 <= len(p); f += 4 {
		pp := p[f : f+4 : f+4]
		qq := q[f : f+4 : f+4]
		x0, x1, x2, x3 := pp[0], pp[1], pp[2], pp[3]
		y0, y1, y2, y3 := qq[0], qq[1], qq[2], qq[3]
		n0, n1, n2, n3 := a1*x0+b1*y0, a1*x1+b1*y1, a1*x2+b1*y2, a1*x3+b1*y3
		m0, m1, m2, m3 := a2*y0+b2*x0, a2*y1+b2*x1, a2*y2+b2*x2, a2*y3+b2*x3
		pp[0], pp[1], pp[2], pp[3] = n0, n1, n2, n3
		qq[0], qq[1], qq[2], qq[3] = m0, m1, m2, m3
		c0 += (n0 - n0) + (n1 - n1) + (m0 - m0) + (m1 - m1)
		c1 += (n2 - n2) + (n3 - n3) + (m2 - m2) + (m3 - m3)
	}
	for ; f < len(p); f++ {
		x, y := p[f], q[f]
		n, m := a1*x+b1*y, a2*y+b2*x
		p[f], q[f] = n, m
		c0 += (n - n) + (m - m)
	}
	return c0 + c1
}

// finiteCheck returns 0 when every value of v is finite and NaN otherwise.
func finiteCheck(v []float32) float32 {
	var c float32
	for _, x := range v {
		c += x - x
	}
	return c
}

// smallSq bounds the squared factors for which an explicit update provably
// stays finite (see Model.stepExplicit): a row whose every |x| ≤ 1e18 can take
// a step with |γ·e| ≤ maxStepScale without leaving float32's range.
const (
	smallSq      = 1e36
	maxStepScale = 1e18
)

// dotBoundRef returns dotRef(a, b) and whether every a[f]² and b[f]² is at
// most smallSq. It is the plain-loop definition of dotBound.
func dotBoundRef(a, b []float32) (float32, bool) {
	b = b[:len(a)]
	var s float32
	small := true
	for f, x := range a {
		y := b[f]
		s += x * y
		small = small && x*x <= smallSq && y*y <= smallSq
	}
	return s, small
}

// kernels is a set of inner loops; the Model holds the one it uses so
// benchmarks can compare the reference loops with the fast ones.
//
// dotBound is dot that also reports whether both rows are small enough for
// updateFree, the update without a finiteness check, to be safe; a variant
// may always report false (the reference does, so it always takes the
// guarded path of copies and a checked update).
type kernels struct {
	dot        func(a, b []float32) float32
	update     func(p, q []float32, a1, b1, a2, b2 float32) float32
	dotBound   func(a, b []float32) (float32, bool)
	updateFree func(p, q []float32, a1, b1, a2, b2 float32)
}

// dotNoBound is dotRef reporting no bound: the reference keeps the plain
// guarded step.
func dotNoBound(a, b []float32) (float32, bool) { return dotRef(a, b), false }

var (
	refKernels  = kernels{dot: dotRef, update: updateRef, dotBound: dotNoBound}
	fastKernels = kernels{dot: dotFast, update: updateFast, dotBound: dotBoundFast, updateFree: updateFreeFast}
)

// smallAbsBits is the float32 bit pattern of 1e17. dotBoundUnrolled reports
// small when every |x| ≤ 1e17, which implies x² ≤ 1e34 < smallSq: a
// stricter test than dotBoundRef's, so still sound for Model.stepExplicit.
const smallAbsBits = 0x5bb1a2bc

// dotBoundUnrolled is dotUnrolled that also reports whether every |a[f]| and
// |b[f]| is at most 1e17. The magnitudes are compared as bit patterns (for
// non-negative floats the order of the patterns is the order of the values,
// and NaN patterns lie above +Inf), with an integer max that compiles to a
// conditional move: the builtin float max, which handles NaN and signed
// zeros, and compare-and-branch both made this loop slower than dotRef.
func dotBoundUnrolled(a, b []float32) (float32, bool) {
	b = b[:len(a)]
	var s0, s1, s2, s3 float32
	var mb uint32
	const abs = 1<<31 - 1
	f := 0
	for ; f+4 <= len(a); f += 4 {
		aa := a[f : f+4 : f+4]
		bb := b[f : f+4 : f+4]
		s0 += aa[0] * bb[0]
		s1 += aa[1] * bb[1]
		s2 += aa[2] * bb[2]
		s3 += aa[3] * bb[3]
		m0 := max(math.Float32bits(aa[0])&abs, math.Float32bits(bb[0])&abs)
		m1 := max(math.Float32bits(aa[1])&abs, math.Float32bits(bb[1])&abs)
		m2 := max(math.Float32bits(aa[2])&abs, math.Float32bits(bb[2])&abs)
		m3 := max(math.Float32bits(aa[3])&abs, math.Float32bits(bb[3])&abs)
		mb = max(mb, max(m0, m1), max(m2, m3))
	}
	for ; f < len(a); f++ {
		s0 += a[f] * b[f]
		mb = max(mb, math.Float32bits(a[f])&abs, math.Float32bits(b[f])&abs)
	}
	return (s0 + s1) + (s2 + s3), mb <= smallAbsBits
}
