package online

import (
	"math"
	"unsafe"
)

// Rows live in chunks of chunkRows rows per side. Growth adds a chunk and never
// copies, so a row keeps its address for the life of the Model.
const (
	chunkShift = 14
	chunkRows  = 1 << chunkShift
	chunkMask  = chunkRows - 1
)

// Row flags. Bits 0..numConsumers-1 are dirty marks, one per Consumer: a set
// bit means the row is on that consumer's dirty list.
const (
	flagLive uint8 = 1 << 7
)

// rowMeta is the per-row state kept beside the factors.
type rowMeta struct {
	last  int64 // event time (ms) of the last update
	bias  float32
	count uint32 // SGD updates the row has had
	epoch uint32 // latent basis epoch
	flags uint8  // dirty bits and flagLive
}

// table is one side's factor table: k float32s per row plus rowMeta, in
// chunks, with a free list of rows that were deleted and can be reused.
type table struct {
	k    int
	vec  [][]float32 // each chunkRows*k long
	meta [][]rowMeta // each chunkRows long
	next int32       // high-water row count
	free []int32     // freed rows, reused last-in first-out
	live int
	max  int // cap on live rows; 0 = none
	maps *mappings
}

// row returns the k factors of row r. It does not check liveness.
func (t *table) row(r int32) []float32 {
	return t.vec[r>>chunkShift][int(r&chunkMask)*t.k:][:t.k]
}

// m returns the metadata of row r.
func (t *table) m(r int32) *rowMeta {
	return &t.meta[r>>chunkShift][r&chunkMask]
}

// isLive reports whether r is a live row.
func (t *table) isLive(r int32) bool {
	return r >= 0 && r < t.next && t.meta[r>>chunkShift][r&chunkMask].flags&flagLive != 0
}

// liveMeta returns the metadata of r when r is a live row, and nil otherwise.
func (t *table) liveMeta(r int32) *rowMeta {
	if uint32(r) >= uint32(t.next) { // r < 0 wraps above next ≤ 2³¹−1
		return nil
	}
	if md := &t.meta[r>>chunkShift][r&chunkMask]; md.flags&flagLive != 0 {
		return md
	}
	return nil
}

// grow makes rows [0, n) addressable, adding chunks as needed. It does not
// change next.
func (t *table) grow(n int32) {
	for int32(len(t.vec))*chunkRows < n {
		// One mapping holds a chunk's factors and then its metadata
		// (pointer-free, 8-byte aligned since the factors take a multiple of
		// 64 KiB), so both get huge pages.
		vb := uintptr(chunkRows*t.k) * 4
		mb := uintptr(chunkRows) * unsafe.Sizeof(rowMeta{})
		var v []float32
		var md []rowMeta
		if p := t.maps.alloc(vb + mb); p != nil {
			v = unsafe.Slice((*float32)(p), chunkRows*t.k)
			md = unsafe.Slice((*rowMeta)(unsafe.Add(p, vb)), chunkRows)
		} else {
			v = make([]float32, chunkRows*t.k)
			md = make([]rowMeta, chunkRows)
		}
		t.vec = append(t.vec, v)
		t.meta = append(t.meta, md)
	}
}

// full reports whether the cap on live rows is reached.
func (t *table) full() bool { return t.max > 0 && t.live >= t.max }

// alloc returns a row for a new ID: the most recently freed row, or a new
// row at the high-water mark. The row is zeroed and marked live. The caller
// checks full first.
func (t *table) alloc() int32 {
	var r int32
	if n := len(t.free); n > 0 {
		r = t.free[n-1]
		t.free = t.free[:n-1]
	} else {
		if t.next == math.MaxInt32 {
			return -1
		}
		r = t.next
		t.grow(r + 1)
		t.next++
	}
	md := t.m(r)
	dirty := md.flags &^ flagLive // dirty-list membership outlives the row's owner
	*md = rowMeta{flags: dirty | flagLive}
	clear(t.row(r))
	t.live++
	return r
}

// release wipes live row r (factors and metadata, keeping dirty-list
// membership) and puts it on the free list.
func (t *table) release(r int32) {
	md := t.m(r)
	dirty := md.flags &^ flagLive
	*md = rowMeta{flags: dirty}
	clear(t.row(r))
	t.free = append(t.free, r)
	t.live--
}

// claim makes row r live for recovery, wherever it is: beyond the high-water
// mark (the rows skipped over go on the free list) or on the free list.
func (t *table) claim(r int32) {
	if t.isLive(r) {
		return
	}
	if r >= t.next {
		t.grow(r + 1)
		for g := t.next; g < r; g++ {
			t.free = append(t.free, g)
		}
		t.next = r + 1
	} else {
		// Recovery only: a linear search of the free list.
		for j, f := range t.free {
			if f == r {
				t.free = append(t.free[:j], t.free[j+1:]...)
				break
			}
		}
	}
	md := t.m(r)
	md.flags = md.flags&^flagLive | flagLive
	t.live++
}
