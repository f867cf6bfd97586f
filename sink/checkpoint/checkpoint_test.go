package checkpoint

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"

	"freshet.dev/freshet/online"
)

func TestEmptyDirectoryIsANewModel(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "data")
	s, got, meta, info := recoverDir(t, dir, 0)
	defer s.Close()
	if meta != nil || len(got) != 0 || info.Snapshot != "" || len(info.Logs) != 0 {
		t.Fatalf("empty directory recovered meta %v, %d rows, info %+v", meta, len(got), info)
	}
	st, err := os.Stat(dir)
	if err != nil {
		t.Fatal(err)
	}
	if perm := st.Mode().Perm(); perm != 0o750 {
		t.Errorf("directory mode %o, want 750", perm)
	}
}

func TestRoundTrip(t *testing.T) {
	for _, tc := range []struct {
		name string
		// run drives the store; the expected state is the sim's.
		run func(m *sim, s *Store)
		// snapshot is the snapshot recovery should load ("" for none).
		snapshot string
	}{
		{"log only", func(m *sim, s *Store) {
			for range 20 {
				m.appendN(s, 15)
			}
		}, ""},
		{"empty appends", func(m *sim, s *Store) {
			m.appendN(s, 10)
			if err := s.Append(nil, m.nextMeta()); err != nil {
				t.Fatal(err)
			}
			rs := new(online.RowSet)
			if err := s.Append(rs, m.nextMeta()); err != nil {
				t.Fatal(err)
			}
		}, ""},
		{"snapshot first", func(m *sim, s *Store) {
			m.snapshot(s, 7)
			m.appendN(s, 30)
		}, "snap-0000000001.bin"},
		{"snapshots and logs", func(m *sim, s *Store) {
			for range 3 {
				for range 10 {
					m.appendN(s, 20)
				}
				m.snapshot(s, 25)
			}
			m.appendN(s, 10)
		}, "snap-0000000004.bin"},
		{"commit is the last thing", func(m *sim, s *Store) {
			m.appendN(s, 50)
			m.snapshot(s, 16)
		}, "snap-0000000002.bin"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			s, _, _, _ := recoverDir(t, dir, 0)
			m := newSim(t, 7, 8)
			tc.run(m, s)
			if err := s.Close(); err != nil {
				t.Fatal(err)
			}
			s2, got, meta, info := recoverDir(t, dir, 0)
			defer s2.Close()
			sameState(t, got, m.live)
			sameMeta(t, meta, m.meta)
			if info.Snapshot != tc.snapshot {
				t.Errorf("loaded snapshot %q, want %q", info.Snapshot, tc.snapshot)
			}
			if info.TornBytes != 0 || len(info.SetAside) != 0 {
				t.Errorf("clean shutdown reported damage: %+v", info)
			}

			// Appends after recovery continue the same log cleanly.
			m.appendN(s2, 12)
			if err := s2.Close(); err != nil {
				t.Fatal(err)
			}
			s3, got, meta, _ := recoverDir(t, dir, 0)
			defer s3.Close()
			sameState(t, got, m.live)
			sameMeta(t, meta, m.meta)
		})
	}
}

func TestRecoverAppliesInWrittenOrder(t *testing.T) {
	// A row deleted and its row number reused for a new ID must come back
	// as the new ID, and an ID deleted after its snapshot copy must stay gone.
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	const k = 2
	put := func(rs *online.RowSet, side online.Side, r int32, id string, v float32) {
		rs.Append(online.RowRecord{Side: side, Row: r, ID: []byte(id), Vec: []float32{v, -v}, Count: 1})
	}
	del := func(rs *online.RowSet, side online.Side, r int32, id string) {
		rs.Append(online.RowRecord{Side: side, Row: r, ID: []byte(id), Deleted: true})
	}
	meta := func(seq uint64) *online.Meta { return &online.Meta{Format: online.MetaFormat, Rank: k, Seq: seq} }
	rs := new(online.RowSet)
	rs.Reset(k)
	put(rs, online.Users, 0, "ada", 1)
	put(rs, online.Users, 1, "bo", 2)
	put(rs, online.Items, 0, "show-a", 3)
	if err := s.Append(rs, meta(1)); err != nil {
		t.Fatal(err)
	}
	if err := s.BeginSnapshot(meta(1)); err != nil {
		t.Fatal(err)
	}
	if err := s.WriteRows(rs); err != nil { // copy of all three rows
		t.Fatal(err)
	}
	rs2 := new(online.RowSet)
	rs2.Reset(k)
	del(rs2, online.Users, 0, "ada")
	put(rs2, online.Users, 0, "cy", 4) // row 0 reused
	del(rs2, online.Items, 0, "show-a")
	if err := s.Append(rs2, meta(2)); err != nil {
		t.Fatal(err)
	}
	if err := s.Commit(meta(2)); err != nil {
		t.Fatal(err)
	}
	s.Close()

	s2, got, m, info := recoverDir(t, dir, 0)
	defer s2.Close()
	want := state{}
	want.apply(&online.RowRecord{Side: online.Users, Row: 0, ID: []byte("cy"), Vec: []float32{4, -4}, Count: 1})
	want.apply(&online.RowRecord{Side: online.Users, Row: 1, ID: []byte("bo"), Vec: []float32{2, -2}, Count: 1})
	sameState(t, got, want)
	if m.Seq != 2 || info.SnapshotRows != 3 || info.LogRows != 3 || info.Records != 1 {
		t.Errorf("seq %d, info %+v; want seq 2, 3 snapshot rows, 1 record of 3 rows", m.Seq, info)
	}
	if want := []string{"log-0000000002.bin", "snap-0000000002.bin"}; !slices.Equal(files(t, dir), want) {
		t.Errorf("files %v, want %v", files(t, dir), want)
	}
}

// TestTornLastRecord cuts the log at every byte offset within its last record
// and checks that recovery drops exactly that record, reports it, and that
// Appends afterwards continue cleanly.
func TestTornLastRecord(t *testing.T) {
	for _, withSnapshot := range []bool{false, true} {
		t.Run(fmt.Sprintf("snapshot=%v", withSnapshot), func(t *testing.T) {
			dir := t.TempDir()
			s, _, _, _ := recoverDir(t, dir, 0)
			m := newSim(t, 11, 4)
			for range 5 {
				m.appendN(s, 6)
			}
			if withSnapshot {
				m.snapshot(s, 5)
				m.appendN(s, 6)
			}
			before, beforeMeta := m.live.clone(), m.meta
			logFile := s.logName
			start := s.logEnd
			m.appendN(s, 3)
			end := s.logEnd
			s.Close()
			after, afterMeta := m.live, m.meta
			pristine, err := os.ReadFile(filepath.Join(dir, logFile))
			if err != nil {
				t.Fatal(err)
			}
			if int64(len(pristine)) != end {
				t.Fatalf("log is %d bytes, store says %d", len(pristine), end)
			}
			img := crashImage(t, dir)
			for cut := start; cut <= end; cut++ {
				path := filepath.Join(img, logFile)
				if err := os.WriteFile(path, pristine[:cut], 0o640); err != nil {
					t.Fatal(err)
				}
				s2, got, meta, info := recoverDir(t, img, 0)
				wantState, wantMeta, wantTorn := before, beforeMeta, cut-start
				if cut == end {
					wantState, wantMeta, wantTorn = after, afterMeta, 0
				}
				sameState(t, got, wantState)
				sameMeta(t, meta, wantMeta)
				if info.TornBytes != wantTorn {
					t.Fatalf("cut at %d: torn bytes %d, want %d", cut, info.TornBytes, wantTorn)
				}
				if wantTorn > 0 && (info.TornFile != logFile || info.TornOffset != start) {
					t.Fatalf("cut at %d: torn at %s offset %d, want %s offset %d", cut, info.TornFile, info.TornOffset, logFile, start)
				}
				if size := fileSize(t, path); wantTorn > 0 && size != start {
					t.Fatalf("cut at %d: log is %d bytes after recovery, want it cut to %d", cut, size, start)
				}
				if cut != start+1 && cut != end-1 && cut != end {
					s2.Close()
					continue
				}
				// Writing on after the cut gives a log that recovers in full.
				m2 := *m
				m2.live = wantState.clone()
				m2.appendN(s2, 2)
				s2.Close()
				s3, got, meta, info := recoverDir(t, img, 0)
				s3.Close()
				sameState(t, got, m2.live)
				sameMeta(t, meta, m2.meta)
				if info.TornBytes != 0 {
					t.Fatalf("cut at %d: second recovery found %d torn bytes", cut, info.TornBytes)
				}
			}
		})
	}
}

func TestTornLogHeader(t *testing.T) {
	// A crash while BeginSnapshot creates the new log leaves a short header.
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	m := newSim(t, 3, 4)
	m.appendN(s, 10)
	m.snapshot(s, 4)
	m.appendN(s, 5)
	if err := s.BeginSnapshot(m.nextMeta()); err != nil {
		t.Fatal(err)
	}
	newLog := s.logName
	img := crashImage(t, dir)
	s.Close()
	for cut := range int64(fileHeaderSize) {
		if err := os.Truncate(filepath.Join(img, newLog), cut); err != nil {
			t.Fatal(err)
		}
		s2, got, meta, info := recoverDir(t, img, 0)
		sameState(t, got, m.live)
		if meta.Seq != m.meta.Seq-1 { // the BeginSnapshot meta is in no record
			t.Errorf("cut %d: seq %d, want %d", cut, meta.Seq, m.meta.Seq-1)
		}
		if info.TornBytes != cut || (cut > 0 && (info.TornFile != newLog || info.TornOffset != 0)) {
			t.Errorf("cut %d: info %+v", cut, info)
		}
		if size := fileSize(t, filepath.Join(img, newLog)); size != fileHeaderSize {
			t.Errorf("cut %d: header not rewritten, file is %d bytes", cut, size)
		}
		s2.Close()
	}
}

// record returns the offsets of the records of a log file.
func recordOffsets(t *testing.T, b []byte) []int64 {
	t.Helper()
	var offs []int64
	for off := int64(fileHeaderSize); off < int64(len(b)); {
		h, ok := parseFrameHead(b[off:])
		if !ok {
			t.Fatalf("bad frame at %d", off)
		}
		offs = append(offs, off)
		off += frameHeadSize + h.length
	}
	return offs
}

func TestCorruptRecordIsAnError(t *testing.T) {
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	m := newSim(t, 5, 4)
	for range 4 {
		m.appendN(s, 5)
	}
	m.beginAndWrite(s, 100) // rotates to log 2, with one record
	lastLog := s.logName
	s.Close()
	first := logName(1)
	b, err := os.ReadFile(filepath.Join(dir, first))
	if err != nil {
		t.Fatal(err)
	}
	offs := recordOffsets(t, b)
	for _, tc := range []struct {
		name string
		file string
		at   int64 // byte flipped
		off  int64 // offset the error must name
	}{
		{"payload of a middle record", first, offs[1] + frameHeadSize + 9, offs[1]},
		{"length of a middle record", first, offs[2] + 4, offs[2]},
		{"header checksum of a middle record", first, offs[1] + 13, offs[1]},
		// log-1 is not the newest log: damage at its end is not a torn write.
		{"last record of an older log", first, offs[3] + frameHeadSize + 2, offs[3]},
		{"file header", first, 9, 0},
		{"newest log's header", lastLog, 3, 0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			img := crashImage(t, dir)
			path := filepath.Join(img, tc.file)
			c, err := os.ReadFile(path)
			if err != nil {
				t.Fatal(err)
			}
			c[tc.at] ^= 0x40
			if err := os.WriteFile(path, c, 0o640); err != nil {
				t.Fatal(err)
			}
			s, err := Open(Options{Dir: img})
			if err != nil {
				t.Fatal(err)
			}
			defer s.Close()
			_, _, err = s.Recover(state{}.apply)
			var ce *CorruptError
			if !errors.As(err, &ce) || !errors.Is(err, ErrCorrupt) {
				t.Fatalf("Recover = %v, want a *CorruptError", err)
			}
			if ce.File != tc.file || ce.Offset != tc.off {
				t.Errorf("error names %s offset %d, want %s offset %d (%v)", ce.File, ce.Offset, tc.file, tc.off, err)
			}
			if err := s.Append(nil, m.nextMeta()); !errors.Is(err, ErrNotRecovered) {
				t.Errorf("Append after a failed Recover = %v, want ErrNotRecovered", err)
			}
		})
	}
}

func TestMissingLogIsAnError(t *testing.T) {
	for _, tc := range []struct {
		name    string
		run     func(m *sim, s *Store)
		removed uint64
		want    string
	}{
		{"no snapshot, log-1 gone", func(m *sim, s *Store) {
			m.appendN(s, 5)
			m.beginAndWrite(s, 100) // log 2; the snapshot is abandoned at Close
		}, 1, "no usable snapshot and the logs start at log-0000000002.bin, not log-1"},
		{"log after the snapshot gone", func(m *sim, s *Store) {
			m.appendN(s, 5)
			m.snapshot(s, 4) // snapshot and log 2
			m.appendN(s, 5)
			m.beginAndWrite(s, 100) // log 3
			m.beginAndWrite(s, 100) // log 4
		}, 3, "snap-0000000002.bin offset 0: log-0000000003.bin is missing"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			s, _, _, _ := recoverDir(t, dir, 0)
			tc.run(newSim(t, 5, 4), s)
			s.Close()
			if err := os.Remove(filepath.Join(dir, logName(tc.removed))); err != nil {
				t.Fatal(err)
			}
			s2 := open(t, dir, 0)
			defer s2.Close()
			_, _, err := s2.Recover(state{}.apply)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("Recover = %v, want an error containing %q", err, tc.want)
			}
		})
	}
}

func TestHalfWrittenSnapshot(t *testing.T) {
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	m := newSim(t, 9, 16)
	for range 10 {
		m.appendN(s, 40)
	}
	m.snapshot(s, 50)
	for range 5 {
		m.appendN(s, 40)
	}
	complete, err := os.ReadFile(filepath.Join(dir, snapName(2)))
	if err != nil {
		t.Fatal(err)
	}
	m.beginAndWrite(s, 30)

	for _, tc := range []struct {
		name string
		tmp  func(img string) // lays the .tmp file down in the image
	}{
		{"crash image", func(string) {}},
		{"half a snapshot", func(img string) {
			os.WriteFile(filepath.Join(img, "snap-0000000003.tmp"), complete[:len(complete)/2], 0o640)
		}},
		{"whole snapshot not yet renamed", func(img string) {
			os.WriteFile(filepath.Join(img, "snap-0000000003.tmp"), complete, 0o640)
		}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			img := crashImage(t, dir)
			tc.tmp(img)
			if !hasSuffix(files(t, img), ".tmp") {
				t.Fatal("image holds no .tmp file")
			}
			s2, got, meta, info := recoverDir(t, img, 0)
			defer s2.Close()
			if hasSuffix(files(t, img), ".tmp") {
				t.Errorf("Open left a .tmp file: %v", files(t, img))
			}
			sameState(t, got, m.live)
			sameMeta(t, meta, m.meta)
			want := []string{"log-0000000002.bin", "log-0000000003.bin"}
			if info.Snapshot != snapName(2) || !slices.Equal(info.Logs, want) {
				t.Errorf("recovered from %s + %v, want %s + %v", info.Snapshot, info.Logs, snapName(2), want)
			}
		})
	}
	s.Close()
}

// TestCrashBetweenBeginAndCommit stops without Commit (Close abandons the
// snapshot, as a crash would) and checks the old snapshot, old log and new
// log recover the exact state; then a later snapshot completes normally.
func TestCrashBetweenBeginAndCommit(t *testing.T) {
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	m := newSim(t, 13, 8)
	for range 6 {
		m.appendN(s, 25)
	}
	m.snapshot(s, 40)
	m.appendN(s, 25)
	m.beginAndWrite(s, 20)
	m.appendN(s, 25)
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	want := []string{"log-0000000002.bin", "log-0000000003.bin", "snap-0000000002.bin"}
	if !slices.Equal(files(t, dir), want) {
		t.Fatalf("files %v, want %v", files(t, dir), want)
	}
	s2, got, meta, info := recoverDir(t, dir, 0)
	sameState(t, got, m.live)
	sameMeta(t, meta, m.meta)
	if info.Snapshot != snapName(2) || len(info.Logs) != 2 {
		t.Errorf("info %+v", info)
	}
	// A second BeginSnapshot without Commit also abandons the first.
	m.beginAndWrite(s2, 50)
	m.snapshot(s2, 50)
	s2.Close()
	want = []string{"log-0000000005.bin", "snap-0000000005.bin"}
	if !slices.Equal(files(t, dir), want) {
		t.Errorf("files %v, want %v", files(t, dir), want)
	}
	s3, got, meta, _ := recoverDir(t, dir, 0)
	defer s3.Close()
	sameState(t, got, m.live)
	sameMeta(t, meta, m.meta)
}

// TestCrashDuringCommit rebuilds the disk as it would be at each step of
// Commit: before the rename (the complete .tmp is removed at Open), and after
// the rename but before old files are pruned.
func TestCrashDuringCommit(t *testing.T) {
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	m := newSim(t, 17, 8)
	for range 6 {
		m.appendN(s, 25)
	}
	m.snapshot(s, 40)
	m.appendN(s, 25)
	m.beginAndWrite(s, 20)
	m.appendN(s, 3)
	beforeCommit := crashImage(t, dir)
	if err := s.Commit(m.meta); err != nil {
		t.Fatal(err)
	}
	s.Close()
	final, err := os.ReadFile(filepath.Join(dir, snapName(3)))
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name, file, snapshot string
	}{
		{"before rename", "snap-0000000003.tmp", snapName(2)},
		{"after rename, before prune", snapName(3), snapName(3)},
	} {
		t.Run(tc.name, func(t *testing.T) {
			img := crashImage(t, beforeCommit)
			os.Remove(filepath.Join(img, "snap-0000000003.tmp"))
			if err := os.WriteFile(filepath.Join(img, tc.file), final, 0o640); err != nil {
				t.Fatal(err)
			}
			s2, got, meta, info := recoverDir(t, img, 0)
			defer s2.Close()
			sameState(t, got, m.live)
			sameMeta(t, meta, m.meta)
			if info.Snapshot != tc.snapshot {
				t.Errorf("loaded %s, want %s", info.Snapshot, tc.snapshot)
			}
		})
	}
}

func TestLock(t *testing.T) {
	dir := t.TempDir()
	s := open(t, dir, 0)
	// flock belongs to the open file description: a second Open in the same
	// process gets its own description and is refused.
	s2, err := Open(Options{Dir: dir})
	if err == nil {
		s2.Close()
		t.Fatal("second Open of a locked directory succeeded")
	}
	if !errors.Is(err, ErrLocked) {
		t.Fatalf("second Open = %v, want ErrLocked", err)
	}
	for _, want := range []string{dir, "process " + strconv.Itoa(os.Getpid())} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error %q does not name %q", err, want)
		}
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Errorf("second Close = %v", err)
	}
	s3, err := Open(Options{Dir: dir})
	if err != nil {
		t.Fatalf("Open after Close: %v", err)
	}
	s3.Close()
}

func TestKeepPruning(t *testing.T) {
	for _, keep := range []int{1, 2, 3} {
		t.Run(fmt.Sprintf("keep=%d", keep), func(t *testing.T) {
			dir := t.TempDir()
			s, _, _, _ := recoverDir(t, dir, keep)
			m := newSim(t, uint64(keep), 4)
			m.appendN(s, 10) // log 1
			for n := 1; n <= 5; n++ {
				m.snapshot(s, 6) // snapshot n+1
				m.appendN(s, 10)
				var want []string
				oldest := max(2, n+2-keep)
				for g := oldest; g <= n+1; g++ {
					want = append(want, logName(uint64(g)))
				}
				for g := oldest; g <= n+1; g++ {
					want = append(want, snapName(uint64(g)))
				}
				if got := files(t, dir); !slices.Equal(got, want) {
					t.Fatalf("after snapshot %d: files %v, want %v", n+1, got, want)
				}
			}
			s.Close()
			s2, got, meta, _ := recoverDir(t, dir, keep)
			defer s2.Close()
			sameState(t, got, m.live)
			sameMeta(t, meta, m.meta)
		})
	}
}

// TestSnapshotFallback damages the newest snapshot: with Keep 2 recovery falls
// back to the previous one and its logs; with Keep 1 it cannot.
func TestSnapshotFallback(t *testing.T) {
	for _, tc := range []struct {
		name  string
		keep  int
		snaps int
		ok    bool
		from  string
	}{
		{"keep 2", 2, 3, true, snapName(3)},
		{"keep 1", 1, 3, false, ""},
		{"keep 1, log-1 still there", 1, 1, true, ""},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			s, _, _, _ := recoverDir(t, dir, tc.keep)
			m := newSim(t, 21, 8)
			if tc.snaps > 1 {
				m.appendN(s, 20)
			}
			for range tc.snaps {
				m.snapshot(s, 9)
				m.appendN(s, 20)
			}
			newest := snapName(s.gen)
			s.Close()
			path := filepath.Join(dir, newest)
			b, err := os.ReadFile(path)
			if err != nil {
				t.Fatal(err)
			}
			b[fileHeaderSize+blockPrefix+5] ^= 1 // inside the first rows block
			if err := os.WriteFile(path, b, 0o640); err != nil {
				t.Fatal(err)
			}
			s2 := open(t, dir, tc.keep)
			defer s2.Close()
			got := state{}
			meta, info, err := s2.Recover(got.apply)
			if !tc.ok {
				if err == nil || !strings.Contains(err.Error(), "no usable snapshot") {
					t.Fatalf("Recover = %v, want no usable snapshot", err)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			sameState(t, got, m.live)
			sameMeta(t, meta, m.meta)
			if info.Snapshot != tc.from || len(info.SetAside) != 1 || info.SetAside[0].File != newest ||
				!errors.Is(info.SetAside[0].Err, ErrCorrupt) {
				t.Errorf("info %+v, want loaded %q, %s set aside", info, tc.from, newest)
			}
			if _, err := os.Stat(path + ".bad"); err != nil {
				t.Errorf("damaged snapshot not set aside: %v", err)
			}
		})
	}
}

func TestBadInput(t *testing.T) {
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	defer s.Close()
	meta := &online.Meta{Format: online.MetaFormat, Rank: 3, Seq: 1}
	short := new(online.RowSet)
	short.Reset(3)
	short.Append(online.RowRecord{Side: online.Users, Row: 0, ID: []byte("a"), Vec: []float32{1, 2, 3}})
	short.Append(online.RowRecord{Side: online.Items, Row: 7, ID: []byte("b"), Vec: []float32{1, 2}})
	badSide := new(online.RowSet)
	badSide.Reset(3)
	badSide.Append(online.RowRecord{Side: 5, Row: 2, Vec: []float32{1, 2, 3}})
	longID := new(online.RowSet)
	longID.Reset(3)
	longID.Append(online.RowRecord{Side: online.Users, Row: 4, ID: make([]byte, 70000), Vec: []float32{1, 2, 3}})
	otherRank := new(online.RowSet)
	otherRank.Reset(4)
	otherRank.Append(online.RowRecord{Vec: []float32{1, 2, 3, 4}})
	for _, tc := range []struct {
		name string
		call func() error
		want string
	}{
		{"short vector", func() error { return s.Append(short, meta) }, "record 1 (item row 7): vector has 2 factors, want rank 3"},
		{"bad side", func() error { return s.Append(badSide, meta) }, "record 0 (item row 2): side 5"},
		{"long id", func() error { return s.Append(longID, meta) }, "record 0 (user row 4): id is 70000 bytes"},
		{"row set rank", func() error { return s.Append(otherRank, meta) }, "row set rank 4 differs from meta rank 3"},
		{"nil meta", func() error { return s.Append(short, nil) }, "meta is nil"},
		{"zero rank", func() error { return s.Append(nil, &online.Meta{}) }, "meta rank 0 out of range"},
		{"write rows without begin", func() error { return s.WriteRows(short) }, ErrNoSnapshot.Error()},
		{"commit without begin", func() error { return s.Commit(meta) }, ErrNoSnapshot.Error()},
	} {
		t.Run(tc.name, func(t *testing.T) {
			err := tc.call()
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("error %v, want it to contain %q", err, tc.want)
			}
		})
	}
	// The refused calls wrote nothing: the store goes on normally.
	if err := s.Append(nil, meta); err != nil {
		t.Fatal(err)
	}
	if err := s.BeginSnapshot(meta); err != nil {
		t.Fatal(err)
	}
	if err := s.WriteRows(short); err == nil || !strings.Contains(err.Error(), "record 1 (item row 7)") {
		t.Fatalf("WriteRows of a short vector = %v", err)
	}
	if err := s.WriteRows(firstOf(short)); err != nil {
		t.Fatal(err)
	}
	if err := s.Commit(meta); err == nil || !strings.Contains(err.Error(), "no Append since the last WriteRows") {
		t.Fatalf("Commit without the final Append = %v", err)
	}
	next := &online.Meta{Format: online.MetaFormat, Rank: 3, Seq: 2}
	if err := s.Append(nil, next); err != nil {
		t.Fatal(err)
	}
	if err := s.Commit(meta); err == nil || !strings.Contains(err.Error(), "meta seq 1 is not the seq 2 of the last Append") {
		t.Fatalf("Commit with an older meta = %v", err)
	}
	if err := s.Commit(next); err != nil {
		t.Fatalf("Commit after the refusals: %v", err)
	}
	s.Close()
	s2, got, m, _ := recoverDir(t, dir, 0)
	want := state{}
	want.apply(&short.Recs[0])
	sameState(t, got, want)
	sameMeta(t, m, next)
	s = s2
	defer s2.Close()
	if err := s.Append(nil, &online.Meta{Format: online.MetaFormat, Rank: 4}); err == nil ||
		!strings.Contains(err.Error(), "meta rank 4 differs from the log's rank 3") {
		t.Fatalf("Append at another rank = %v", err)
	}
}

// short2 returns the first record of rs alone.
func firstOf(rs *online.RowSet) *online.RowSet {
	one := new(online.RowSet)
	one.Reset(rs.Rank)
	one.Append(rs.Recs[0])
	return one
}

func TestWriteBeforeRecover(t *testing.T) {
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	m := newSim(t, 1, 2)
	m.appendN(s, 3)
	if _, _, err := s.Recover(state{}.apply); err == nil {
		t.Error("second Recover succeeded")
	}
	s.Close()
	s2 := open(t, dir, 0)
	defer s2.Close()
	if err := s2.Append(nil, m.nextMeta()); !errors.Is(err, ErrNotRecovered) {
		t.Errorf("Append before Recover = %v, want ErrNotRecovered", err)
	}
	if err := s2.BeginSnapshot(m.nextMeta()); !errors.Is(err, ErrNotRecovered) {
		t.Errorf("BeginSnapshot before Recover = %v, want ErrNotRecovered", err)
	}
	s2.Close()
	if err := s2.Append(nil, m.nextMeta()); !errors.Is(err, ErrClosed) {
		t.Errorf("Append after Close = %v, want ErrClosed", err)
	}
}

func TestApplyErrorStopsRecovery(t *testing.T) {
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	m := newSim(t, 1, 2)
	m.appendN(s, 3)
	s.Close()
	s2 := open(t, dir, 0)
	defer s2.Close()
	boom := errors.New("table full")
	_, _, err := s2.Recover(func(*online.RowRecord) error { return boom })
	if !errors.Is(err, boom) || !strings.Contains(err.Error(), "log-0000000001.bin offset") {
		t.Fatalf("Recover = %v, want the apply error with file and offset", err)
	}
}

func TestWriteRowsDoesNotAllocate(t *testing.T) {
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	defer s.Close()
	m := newSim(t, 2, 64)
	rows := m.changes(500)
	if err := s.BeginSnapshot(m.nextMeta()); err != nil {
		t.Fatal(err)
	}
	if err := s.WriteRows(rows); err != nil { // buffers grow here
		t.Fatal(err)
	}
	if n := testing.AllocsPerRun(50, func() {
		if err := s.WriteRows(rows); err != nil {
			t.Fatal(err)
		}
	}); n != 0 {
		t.Errorf("WriteRows allocates %.1f times per call, want 0", n)
	}
	// Append allocates for the meta JSON only (a few times, through
	// encoding/json), never per row.
	if raceEnabled {
		t.Log("Append allocation count not checked under -race (sync.Pool drops items)")
		return
	}
	small, large := m.changes(1), m.changes(2000)
	if err := s.Append(large, m.nextMeta()); err != nil {
		t.Fatal(err)
	}
	meta := m.nextMeta()
	a1 := testing.AllocsPerRun(5, func() { s.Append(small, meta) })
	a2 := testing.AllocsPerRun(5, func() { s.Append(large, meta) })
	if a1 > 8 || a2 > 8 {
		t.Errorf("Append allocates %.1f times for 1 row and %.1f for 2000 rows; want at most 8 either way", a1, a2)
	}
}

func TestZeroTailIsTorn(t *testing.T) {
	// A file system may extend a file for a final write whose data never
	// reached the disk: the tail reads as zeros.
	dir := t.TempDir()
	s, _, _, _ := recoverDir(t, dir, 0)
	m := newSim(t, 8, 4)
	for range 3 {
		m.appendN(s, 5)
	}
	end := s.logEnd
	s.Close()
	path := filepath.Join(dir, logName(1))
	f, err := os.OpenFile(path, os.O_WRONLY|os.O_APPEND, 0)
	if err != nil {
		t.Fatal(err)
	}
	f.Write(make([]byte, 300))
	f.Close()
	s2, got, meta, info := recoverDir(t, dir, 0)
	defer s2.Close()
	sameState(t, got, m.live)
	sameMeta(t, meta, m.meta)
	if info.TornBytes != 300 || info.TornOffset != end {
		t.Errorf("info %+v, want 300 torn bytes at %d", info, end)
	}

	// Non-zero bytes there are damage, not a torn write: a torn write keeps a
	// prefix of the record, whose first 16 bytes are a checksummed header.
	s2.Close()
	f, _ = os.OpenFile(path, os.O_WRONLY|os.O_APPEND, 0)
	f.Write([]byte("this is not a record header"))
	f.Close()
	s3 := open(t, dir, 0)
	defer s3.Close()
	if _, _, err := s3.Recover(state{}.apply); !errors.Is(err, ErrCorrupt) {
		t.Errorf("Recover over a garbage tail = %v, want ErrCorrupt", err)
	}
}
