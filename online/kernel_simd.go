//go:build goexperiment.simd && amd64

package online

import (
	"math"
	"simd/archsimd"
)

// fastKernelName names the fast kernels of this build.
var fastKernelName = func() string {
	if hasAVX2 {
		return "avx2"
	}
	return "unrolled"
}()

// fastBounded reports whether this build's dotBoundFast reports small rows
// (so explicit steps on them skip the guard copies): here it does, with AVX2
// or with the unrolled fallback.
const fastBounded = true

// hasAVX2 reports whether the CPU has AVX2 and FMA; without them the
// unrolled portable loops run.
var hasAVX2 = archsimd.X86.AVX2() && archsimd.X86.FMA()

// dotFast is dotRef with eight-wide AVX2 fused multiply-adds and two
// accumulators. ClearAVXUpperBits (VZEROUPPER) ends the AVX work: without it
// the SSE code that follows pays a state-transition penalty.
func dotFast(a, b []float32) float32 {
	if !hasAVX2 || len(a) < 16 {
		return dotUnrolled(a, b)
	}
	b = b[:len(a)]
	acc0 := archsimd.BroadcastFloat32x8(0)
	acc1 := acc0
	f := 0
	for ; f+16 <= len(a); f += 16 {
		x0 := archsimd.LoadFloat32x8((*[8]float32)(a[f : f+8]))
		y0 := archsimd.LoadFloat32x8((*[8]float32)(b[f : f+8]))
		x1 := archsimd.LoadFloat32x8((*[8]float32)(a[f+8 : f+16]))
		y1 := archsimd.LoadFloat32x8((*[8]float32)(b[f+8 : f+16]))
		acc0 = x0.MulAdd(y0, acc0)
		acc1 = x1.MulAdd(y1, acc1)
	}
	if f+8 <= len(a) {
		x0 := archsimd.LoadFloat32x8((*[8]float32)(a[f : f+8]))
		y0 := archsimd.LoadFloat32x8((*[8]float32)(b[f : f+8]))
		acc0 = x0.MulAdd(y0, acc0)
		f += 8
	}
	s := reduceClear(acc0.Add(acc1))
	for ; f < len(a); f++ {
		s += a[f] * b[f]
	}
	return s
}

// updateFast is updateRef eight values at a time:
//
//	p' = b1·q + a1·p,  q' = b2·p + a2·q  (one multiply and one FMA each)
func updateFast(p, q []float32, a1, b1, a2, b2 float32) float32 {
	if !hasAVX2 || len(p) < 8 {
		return updateUnrolled(p, q, a1, b1, a2, b2)
	}
	q = q[:len(p)]
	va1 := archsimd.BroadcastFloat32x8(a1)
	vb1 := archsimd.BroadcastFloat32x8(b1)
	va2 := archsimd.BroadcastFloat32x8(a2)
	vb2 := archsimd.BroadcastFloat32x8(b2)
	// The zero start of the check comes from va1−va1 (which also flags a
	// non-finite a1), not from BroadcastFloat32x8(0): that compiles to a
	// legacy-SSE XORPS, and executed after the 256-bit broadcasts above it
	// cost ~150 ns per call here (an SSE/AVX transition on dirty upper state).
	chk := va1.Sub(va1)
	f := 0
	for ; f+8 <= len(p); f += 8 {
		pp := (*[8]float32)(p[f : f+8])
		qq := (*[8]float32)(q[f : f+8])
		x := archsimd.LoadFloat32x8(pp)
		y := archsimd.LoadFloat32x8(qq)
		np := y.MulAdd(vb1, x.Mul(va1))
		nq := x.MulAdd(vb2, y.Mul(va2))
		np.Store(pp)
		nq.Store(qq)
		chk = chk.Add(np.Sub(np)).Add(nq.Sub(nq))
	}
	// A lane of chk is 0 when its values were finite and NaN otherwise;
	// Equal(chk, chk) is false exactly on NaN lanes. The mask bits land in a
	// general register, so no float leaves the vector unit before the clear.
	var c float32
	if chk.Equal(chk).ToBits() != 0xff {
		c = nan32
	}
	archsimd.ClearAVXUpperBits()
	for ; f < len(p); f++ {
		x, y := p[f], q[f]
		n, m := a1*x+b1*y, a2*y+b2*x
		p[f], q[f] = n, m
		c += (n - n) + (m - m)
	}
	return c
}

// reduceClear returns the sum of v's lanes and ends the AVX work. The
// 256-bit part of the reduction (folding the high half onto the low) runs
// before a 128-bit store; the store is ordered against ClearAVXUpperBits,
// while pure vector arithmetic is not, and a 256-bit operation scheduled
// after the VZEROUPPER (seen in the generated code) brings the transition
// penalty back. The last four lanes are summed as scalars.
func reduceClear(v archsimd.Float32x8) float32 {
	var a [4]float32
	v.GetLo().Add(v.GetHi()).Store(&a)
	archsimd.ClearAVXUpperBits()
	return (a[0] + a[2]) + (a[1] + a[3])
}

// nan32 is a float32 NaN, the check value of a non-finite update.
var nan32 = float32(math.NaN())

// dotBoundFast is dotFast that also tracks max(a[f]², b[f]²) lane-wise and
// compares it with smallSq before the single clear. VMAXPS drops a NaN
// operand in one position, so the lane maximum can miss a NaN; a NaN input
// makes the dot product NaN, though, and the final s−s = 0 test catches it
// (and an infinite input, whose square fails the comparison anyway).
func dotBoundFast(a, b []float32) (float32, bool) {
	if !hasAVX2 || len(a) < 16 {
		return dotBoundUnrolled(a, b)
	}
	b = b[:len(a)]
	acc0 := archsimd.BroadcastFloat32x8(0)
	acc1 := acc0
	mx0, mx1 := acc0, acc0
	f := 0
	for ; f+16 <= len(a); f += 16 {
		x0 := archsimd.LoadFloat32x8((*[8]float32)(a[f : f+8]))
		y0 := archsimd.LoadFloat32x8((*[8]float32)(b[f : f+8]))
		x1 := archsimd.LoadFloat32x8((*[8]float32)(a[f+8 : f+16]))
		y1 := archsimd.LoadFloat32x8((*[8]float32)(b[f+8 : f+16]))
		acc0 = x0.MulAdd(y0, acc0)
		acc1 = x1.MulAdd(y1, acc1)
		mx0 = mx0.Max(x0.Mul(x0).Max(y0.Mul(y0)))
		mx1 = mx1.Max(x1.Mul(x1).Max(y1.Mul(y1)))
	}
	if f+8 <= len(a) {
		x0 := archsimd.LoadFloat32x8((*[8]float32)(a[f : f+8]))
		y0 := archsimd.LoadFloat32x8((*[8]float32)(b[f : f+8]))
		acc0 = x0.MulAdd(y0, acc0)
		mx0 = mx0.Max(x0.Mul(x0).Max(y0.Mul(y0)))
		f += 8
	}
	small := mx0.Max(mx1).LessEqual(archsimd.BroadcastFloat32x8(smallSq)).ToBits() == 0xff
	s := reduceRegClear(acc0.Add(acc1))
	for ; f < len(a); f++ {
		x, y := a[f], b[f]
		s += x * y
		small = small && x*x <= smallSq && y*y <= smallSq
	}
	return s, small && s-s == 0
}

// updateFreeFast is updateFast without the finiteness check, for rows the
// caller has proved cannot overflow.
func updateFreeFast(p, q []float32, a1, b1, a2, b2 float32) {
	if !hasAVX2 || len(p) < 8 {
		updateUnrolled(p, q, a1, b1, a2, b2)
		return
	}
	q = q[:len(p)]
	va1 := archsimd.BroadcastFloat32x8(a1)
	vb1 := archsimd.BroadcastFloat32x8(b1)
	va2 := archsimd.BroadcastFloat32x8(a2)
	vb2 := archsimd.BroadcastFloat32x8(b2)
	f := 0
	for ; f+8 <= len(p); f += 8 {
		pp := (*[8]float32)(p[f : f+8])
		qq := (*[8]float32)(q[f : f+8])
		x := archsimd.LoadFloat32x8(pp)
		y := archsimd.LoadFloat32x8(qq)
		y.MulAdd(vb1, x.Mul(va1)).Store(pp)
		x.MulAdd(vb2, y.Mul(va2)).Store(qq)
	}
	archsimd.ClearAVXUpperBits()
	for ; f < len(p); f++ {
		x, y := p[f], q[f]
		p[f], q[f] = a1*x+b1*y, a2*y+b2*x
	}
}

// reduceRegClear is reduceClear with the lane sums done in registers: fold
// the high half onto the low, then two pairwise adds (VHADDPS) leave the
// sum in lane 0. It is stored (a store stays ordered before the clear; an
// extract to a register was scheduled after it, behind a legacy-SSE spill)
// and read back as one float after the clear.
func reduceRegClear(v archsimd.Float32x8) float32 {
	var a [4]float32
	w := v.GetLo().Add(v.GetHi())
	w = w.AddPairs(w)
	w.AddPairs(w).Store(&a)
	archsimd.ClearAVXUpperBits()
	return a[0]
}
