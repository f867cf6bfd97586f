//go:build linux

package online

import (
	"runtime"
	"unsafe"

	"golang.org/x/sys/unix"
)

// mappings holds the anonymous mappings a Model's tables live in. They are
// outside the Go heap (the collector never scans or moves them) and are
// unmapped by a cleanup when the Model becomes unreachable.
type mappings struct {
	ptrs  []unsafe.Pointer
	sizes []uintptr
	off   bool // mapping failed once or was turned off: use make
}

// useMmap turns mapped chunks on; tests may turn it off to cover the fallback.
var useMmap = true

// floats returns n zeroed float32s from a private anonymous mapping advised
// for transparent huge pages (fewer TLB misses when steps touch random rows
// of large tables), or nil if mapping is off or fails.
func (ms *mappings) floats(n int) []float32 {
	if ms == nil || ms.off || !useMmap || n == 0 {
		return nil
	}
	size := uintptr(n) * 4
	p, err := unix.MmapPtr(-1, 0, nil, size, unix.PROT_READ|unix.PROT_WRITE, unix.MAP_PRIVATE|unix.MAP_ANONYMOUS)
	if err != nil {
		ms.off = true
		return nil
	}
	// Advice only: a kernel without transparent huge pages refuses it and
	// the mapping still works with normal pages.
	_ = unix.Madvise(unsafe.Slice((*byte)(p), size), unix.MADV_HUGEPAGE)
	ms.ptrs = append(ms.ptrs, p)
	ms.sizes = append(ms.sizes, size)
	return unsafe.Slice((*float32)(p), n)
}

// release unmaps everything.
func (ms *mappings) release() {
	for j, p := range ms.ptrs {
		_ = unix.MunmapPtr(p, ms.sizes[j])
	}
	ms.ptrs, ms.sizes = nil, nil
}

// attachMappings gives m's tables a mapping set, released when m is
// unreachable. Nothing outside the Model may keep a slice of a table row:
// rows leave the Model only as copies (RowSet, ScoresTo).
func attachMappings(m *Model) {
	ms := &mappings{}
	m.tab[Users].maps = ms
	m.tab[Items].maps = ms
	runtime.AddCleanup(m, func(ms *mappings) { ms.release() }, ms)
}
