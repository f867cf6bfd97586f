package checkpoint

import (
	"os"
	"path/filepath"
	"testing"
)

// FuzzRecoverLog feeds arbitrary bytes as the only log of a directory:
// Recover must return state or an error, never panic, and what it accepts
// must recover again identically after its cut.
func FuzzRecoverLog(f *testing.F) {
	dir := f.TempDir()
	s, err := Open(Options{Dir: dir})
	if err != nil {
		f.Fatal(err)
	}
	m := newSim(&testing.T{}, 4, 3)
	for range 3 {
		if err := s.Append(m.changes(4), m.nextMeta()); err != nil {
			f.Fatal(err)
		}
	}
	s.Close()
	valid, err := os.ReadFile(filepath.Join(dir, logName(1)))
	if err != nil {
		f.Fatal(err)
	}
	f.Add(valid)
	f.Add(valid[:len(valid)-7])
	f.Add(valid[:fileHeaderSize])
	f.Add([]byte{})
	f.Fuzz(func(t *testing.T, b []byte) {
		dir := t.TempDir()
		if err := os.WriteFile(filepath.Join(dir, logName(1)), b, 0o640); err != nil {
			t.Fatal(err)
		}
		s, err := Open(Options{Dir: dir})
		if err != nil {
			t.Fatal(err)
		}
		got := state{}
		meta, _, err := s.Recover(got.apply)
		s.Close()
		if err != nil {
			return
		}
		s2, again, meta2, info := recoverDir(t, dir, 0)
		s2.Close()
		sameState(t, again, got)
		sameMeta(t, meta2, meta)
		if info.TornBytes != 0 {
			t.Errorf("second recovery dropped %d more bytes", info.TornBytes)
		}
	})
}
