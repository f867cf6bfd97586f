//go:build !amd64

package online

import "unsafe"

// touchRow reads (r in [0, t.next)) one value from every cache line of row r of t and its
// metadata, returning their sum so the loads are not optimized away.
func (t *table) touchRow(r int32) float32 {
	v := t.row(r)
	var s float32
	for f := 0; f < len(v); f += 16 { // 16 float32 = one 64-byte line
		s += v[f]
	}
	return s + t.m(r).bias
}

// touchPair is touchRow of user row u and item row i (both in range).
func touchPair(tu, ti *table, u, i int32) float32 {
	return tu.touchRow(u) + ti.touchRow(i)
}

// prefetchSink keeps prefetchLine's loads from being optimised away.
var prefetchSink byte

// prefetchLine loads the byte at p (a portable stand-in for a prefetch).
func prefetchLine(p unsafe.Pointer) { prefetchSink += *(*byte)(p) }
