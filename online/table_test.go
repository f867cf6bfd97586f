//go:build linux

package online

import (
	"os"
	"regexp"
	"runtime"
	"strconv"
	"testing"
)

// TestMappedChunksUseHugePages checks that mapped chunks are 2 MiB aligned
// and, where the kernel has transparent huge pages in madvise or always mode,
// that touching them shows anonymous huge pages in /proc/self/smaps_rollup.
func TestMappedChunksUseHugePages(t *testing.T) {
	if !useMmap {
		t.Skip("mapped chunks are Linux only")
	}
	m := newModel(t, Options{Rank: 64})
	tab := &m.tab[Users]
	tab.grow(4 * chunkRows) // four 4 MiB chunks
	for _, c := range tab.vec {
		for f := range c {
			c[f] = 1
		}
	}
	if len(tab.maps.ptrs) == 0 {
		t.Skip("mapping unavailable; chunks came from make")
	}
	for _, p := range tab.maps.ptrs {
		if uintptr(p)%(2<<20) != 0 {
			t.Fatalf("chunk at %p is not 2 MiB aligned", p)
		}
	}
	mode, _ := os.ReadFile("/sys/kernel/mm/transparent_hugepage/enabled")
	if !regexp.MustCompile(`\[(always|madvise)\]`).Match(mode) {
		t.Skipf("transparent huge pages off: %s", mode)
	}
	b, err := os.ReadFile("/proc/self/smaps_rollup")
	if err != nil {
		t.Skip(err)
	}
	sm := regexp.MustCompile(`AnonHugePages:\s+(\d+) kB`).FindSubmatch(b)
	if sm == nil {
		t.Skip("no AnonHugePages line")
	}
	kb, _ := strconv.Atoi(string(sm[1]))
	t.Logf("AnonHugePages %d kB", kb)
	if kb == 0 {
		t.Log("no huge pages granted (memory fragmented or khugepaged behind); chunks still work")
	}
	runtime.KeepAlive(m)
}
