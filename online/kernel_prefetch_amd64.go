package online

import "unsafe"

// prefetchRange asks the CPU to bring every cache line of [p, p+n) towards
// the core (kernel_amd64.s). n ≥ 1. It reads nothing the Go code can see
// and never faults, so p may point anywhere inside a live mapping.
//
//go:noescape
func prefetchRange(p unsafe.Pointer, n uintptr)

// prefetchPair is prefetchRange(a, n), prefetchRange(b, n),
// prefetchRange(ma, mn), prefetchRange(mb, mn) in one call; mn ≤ 64, so
// prefetching the first and the last byte of each metadata covers it.
//
//go:noescape
func prefetchPair(a, b unsafe.Pointer, n uintptr, ma, mb unsafe.Pointer, mn uintptr)

// touchPair starts the loads of user row u and item row i (both in range)
// and their metadata with one call, and returns 0 like touchRow.
func touchPair(tu, ti *table, u, i int32) float32 {
	prefetchPair(unsafe.Pointer(&tu.vec[u>>chunkShift][int(u&chunkMask)*tu.k]),
		unsafe.Pointer(&ti.vec[i>>chunkShift][int(i&chunkMask)*ti.k]), uintptr(tu.k)*4,
		unsafe.Pointer(tu.m(u)), unsafe.Pointer(ti.m(i)), unsafe.Sizeof(rowMeta{}))
	return 0
}

// touchRow starts the loads of row r of t (r in [0, t.next)) and of its
// metadata with prefetches, and returns 0 (the portable variant returns a
// sum of the values it loaded).
func (t *table) touchRow(r int32) float32 {
	prefetchRange(unsafe.Pointer(&t.vec[r>>chunkShift][int(r&chunkMask)*t.k]), uintptr(t.k)*4)
	prefetchRange(unsafe.Pointer(t.m(r)), unsafe.Sizeof(rowMeta{}))
	return 0
}

// prefetchLine starts loading the cache line holding p.
func prefetchLine(p unsafe.Pointer) { prefetchRange(p, 1) }
