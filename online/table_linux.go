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

// alloc returns size zeroed bytes from a private anonymous mapping advised
// for transparent huge pages (fewer TLB misses when steps touch random rows
// of large tables), or nil if mapping is off or fails. The memory must hold
// no Go pointers.
func (ms *mappings) alloc(size uintptr) unsafe.Pointer {
	if ms == nil || ms.off || !useMmap || size == 0 {
		return nil
	}
	// Map one huge page more than needed and trim to a 2 MiB boundary: a
	// huge page needs an aligned 2 MiB range inside the mapping, and the
	// kernel does not promise to align anonymous mappings.
	const huge = 2 << 20
	span := size + huge
	base, err := unix.MmapPtr(-1, 0, nil, span, unix.PROT_READ|unix.PROT_WRITE, unix.MAP_PRIVATE|unix.MAP_ANONYMOUS)
	if err != nil {
		ms.off = true
		return nil
	}
	start := (uintptr(base) + huge - 1) &^ (huge - 1)
	head := start - uintptr(base)
	if head > 0 {
		_ = unix.MunmapPtr(base, head)
	}
	p := unsafe.Add(base, head)
	if tail := span - head - size; tail > 0 {
		_ = unix.MunmapPtr(unsafe.Add(p, size), tail)
	}
	// Advice only: a kernel without transparent huge pages refuses it and
	// the mapping still works with normal pages.
	_ = unix.Madvise(unsafe.Slice((*byte)(p), size), unix.MADV_HUGEPAGE)
	ms.ptrs = append(ms.ptrs, p)
	ms.sizes = append(ms.sizes, size)
	return p
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
