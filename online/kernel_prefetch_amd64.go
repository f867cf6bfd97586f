package online

import "unsafe"

// prefetchRange asks the CPU to bring every cache line of [p, p+n) towards
// the core (kernel_amd64.s). n ≥ 1. It reads nothing the Go code can see
// and never faults, so p may point anywhere inside a live mapping.
//
//go:noescape
func prefetchRange(p unsafe.Pointer, n uintptr)

// touchRow starts the loads of row r of t (r in [0, t.next)) and of its
// metadata with prefetches, and returns 0 (the portable variant returns a
// sum of the values it loaded).
func (t *table) touchRow(r int32) float32 {
	prefetchRange(unsafe.Pointer(&t.vec[r>>chunkShift][int(r&chunkMask)*t.k]), uintptr(t.k)*4)
	prefetchRange(unsafe.Pointer(t.m(r)), unsafe.Sizeof(rowMeta{}))
	return 0
}
