//go:build goexperiment.simd && amd64

package online

import "simd/archsimd"

// fastKernelName names the fast kernels of this build.
var fastKernelName = func() string {
	if hasAVX2 {
		return "avx2"
	}
	return "unrolled"
}()

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
	acc := acc0.Add(acc1)
	h := acc.GetLo().Add(acc.GetHi())
	h = h.AddPairs(h)
	h = h.AddPairs(h)
	s := h.GetElem(0)
	archsimd.ClearAVXUpperBits()
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
	chk := archsimd.BroadcastFloat32x8(0)
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
	h := chk.GetLo().Add(chk.GetHi())
	h = h.AddPairs(h)
	h = h.AddPairs(h)
	c := h.GetElem(0)
	archsimd.ClearAVXUpperBits()
	for ; f < len(p); f++ {
		x, y := p[f], q[f]
		n, m := a1*x+b1*y, a2*y+b2*x
		p[f], q[f] = n, m
		c += (n - n) + (m - m)
	}
	return c
}
