package stream

import (
	"encoding/base64"
	"os"
	"path/filepath"
	"testing"
)

func TestRejectFileRemoveID(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "rejects.jsonl")
	rf, err := OpenRejectFile(path)
	if err != nil {
		t.Fatal(err)
	}
	defer rf.Close()
	raws := []string{
		`{"user":"listener-17","item":"show-4","value":99}`,       // 0: JSON, user matches
		`{"user":"listener-170","item":"show-4","value":99}`,      // 1: prefix only: kept
		`{"item":"show-4","us\u0065r":"listener\u002d17","x":[1}`, // 2: escaped, not JSON as a whole: removed
		`{"user":"l\u0069stener-17","item":"show-4","value":9}`,   // 3: escaped, parseable: removed
		"listener-17,show-9,x,1000",                               // 4: CSV field: removed
		"show-9\tlistener-17",                                     // 5: TSV field: removed
		"not listener-17x",                                        // 6: not bounded: kept
		"\xffbinary listener-17",                                  // 7: base64 raw, bounded: removed
		`{"user":"listener-2","item":"show-1","value":-1}`,        // 8: kept
	}
	for i, raw := range raws {
		err := rf.Reject(Rejected{Raw: []byte(raw), Err: &DecodeError{Where: whereLine(int64(i + 1)), Field: "value", Reason: "bad"}, Line: int64(i + 1), Offset: int64(100 * i)})
		if err != nil {
			t.Fatal(err)
		}
	}
	if rf.Count() != int64(len(raws)) {
		t.Fatalf("Count = %d", rf.Count())
	}
	before := readRejects(t, path)
	if before[7].Raw != "" || before[7].RawBase64 != base64.StdEncoding.EncodeToString([]byte(raws[7])) {
		t.Fatalf("invalid UTF-8 raw stored as %+v, want base64", before[7])
	}
	removed, err := rf.RemoveID([]byte("listener-17"))
	if err != nil {
		t.Fatal(err)
	}
	after := readRejects(t, path)
	var kept []int64
	for _, l := range after {
		kept = append(kept, l.Line)
	}
	// Lines 1, 3, 4, 5, 6 and 8 name the ID.
	want := []int64{2, 7, 9}
	if removed != 6 || len(kept) != len(want) {
		t.Fatalf("removed %d, kept lines %v; want 6 removed, kept %v", removed, kept, want)
	}
	for i := range want {
		if kept[i] != want[i] {
			t.Fatalf("kept lines %v, want %v", kept, want)
		}
	}
	// Appending continues in the rewritten file.
	if err := rf.Reject(Rejected{Raw: []byte("late"), Err: &DecodeError{Reason: "x"}}); err != nil {
		t.Fatal(err)
	}
	if err := rf.Sync(); err != nil {
		t.Fatal(err)
	}
	if got := readRejects(t, path); len(got) != 4 || got[3].Raw != "late" {
		t.Fatalf("after append: %+v", got)
	}
	fi, err := os.Stat(path)
	if err != nil || fi.Mode().Perm() != 0o600 {
		t.Fatalf("mode %v, %v; want 0600", fi.Mode(), err)
	}
	leftovers, _ := filepath.Glob(filepath.Join(dir, "*.tmp"))
	if len(leftovers) != 0 {
		t.Fatalf("temporary files left: %v", leftovers)
	}
	if err := rf.Close(); err != nil {
		t.Fatal(err)
	}
	if err := rf.Reject(Rejected{Raw: []byte("x")}); err != ErrClosed {
		t.Fatalf("Reject after Close: %v", err)
	}
	if err := rf.Close(); err != nil {
		t.Fatal("second Close:", err)
	}
}
