package checkpoint

import (
	"os"
	"path/filepath"
	"testing"

	"freshet.dev/freshet/online"
)

// TestMarkCountsReapplied: a process that marked more events than its last
// cut holds (as one killed between cuts does) leaves a mark from which the
// next recovery counts the events it will apply again; a damaged mark counts
// nothing rather than something wrong.
func TestMarkCountsReapplied(t *testing.T) {
	dir := t.TempDir()
	s, err := Open(Options{Dir: dir})
	if err != nil {
		t.Fatal(err)
	}
	if _, _, err := s.Recover(func(*online.RowRecord) error { return nil }); err != nil {
		t.Fatal(err)
	}
	var rs online.RowSet
	rs.Reset(2)
	rs.Append(online.RowRecord{Side: online.Users, Row: 0, ID: []byte("listener-1"), Vec: []float32{1, 2}})
	meta := &online.Meta{Format: online.MetaFormat, Rank: 2, Mode: "explicit", Seq: 1, Counts: online.Counts{Applied: 1000}}
	if err := s.Append(&rs, meta); err != nil {
		t.Fatal(err)
	}
	if err := s.Mark(1256); err != nil { // a batch applied after the cut
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}

	reopen := func() RecoverInfo {
		t.Helper()
		s, err := Open(Options{Dir: dir})
		if err != nil {
			t.Fatal(err)
		}
		defer s.Close()
		_, info, err := s.Recover(func(*online.RowRecord) error { return nil })
		if err != nil {
			t.Fatal(err)
		}
		return info
	}
	if info := reopen(); info.Reapply != 256 {
		t.Fatalf("Reapply = %d, want 256 (marked 1256, cut at 1000)", info.Reapply)
	}
	// Flip a bit of the count: the CRC no longer matches.
	p := filepath.Join(dir, markName)
	b, err := os.ReadFile(p)
	if err != nil {
		t.Fatal(err)
	}
	b[0] ^= 1
	if err := os.WriteFile(p, b, 0o640); err != nil {
		t.Fatal(err)
	}
	if info := reopen(); info.Reapply != 0 {
		t.Fatalf("Reapply = %d from a damaged mark, want 0", info.Reapply)
	}
}
