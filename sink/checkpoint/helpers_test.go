package checkpoint

import (
	"cmp"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"reflect"
	"slices"
	"strings"
	"testing"

	"go.uber.org/goleak"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/stream"
)

func TestMain(m *testing.M) { goleak.VerifyTestMain(m) }

// key names a row of a factor table.
type key struct {
	side online.Side
	row  int32
}

// row is a stored copy of a live row.
type row struct {
	id    string
	bias  uint32 // float bits: comparisons are bit for bit
	count uint32
	last  int64
	epoch uint32
	vec   []uint32
}

// state is a model's rows as a test tracks them: what was written, or what
// recovery applied.
type state map[key]row

func (st state) apply(rec *online.RowRecord) error {
	k := key{rec.Side, rec.Row}
	if rec.Deleted {
		delete(st, k)
		return nil
	}
	r := row{id: string(rec.ID), bias: math.Float32bits(rec.Bias), count: rec.Count, last: rec.Last, epoch: rec.Epoch,
		vec: make([]uint32, len(rec.Vec))}
	for i, x := range rec.Vec {
		r.vec[i] = math.Float32bits(x)
	}
	st[k] = r
	return nil
}

func (st state) clone() state {
	c := make(state, len(st))
	for k, v := range st {
		c[k] = v
	}
	return c
}

// rowSet returns the live rows of st as a RowSet, in a fixed order.
func (st state) rowSet(rank int) *online.RowSet {
	keys := make([]key, 0, len(st))
	for k := range st {
		keys = append(keys, k)
	}
	sortKeys(keys)
	rs := new(online.RowSet)
	rs.Reset(rank)
	for _, k := range keys {
		rs.Append(st[k].record(k))
	}
	return rs
}

func sortKeys(keys []key) {
	slices.SortFunc(keys, func(a, b key) int {
		if c := cmp.Compare(a.side, b.side); c != 0 {
			return c
		}
		return cmp.Compare(a.row, b.row)
	})
}

func (r row) record(k key) online.RowRecord {
	vec := make([]float32, len(r.vec))
	for i, b := range r.vec {
		vec[i] = math.Float32frombits(b)
	}
	return online.RowRecord{Side: k.side, Row: k.row, ID: []byte(r.id), Bias: math.Float32frombits(r.bias),
		Count: r.count, Last: r.last, Epoch: r.epoch, Vec: vec}
}

// sameState fails t unless got equals want bit for bit.
func sameState(t *testing.T, got, want state) {
	t.Helper()
	if len(got) != len(want) {
		t.Errorf("recovered %d rows, want %d", len(got), len(want))
	}
	bad := 0
	for k, w := range want {
		g, ok := got[k]
		switch {
		case !ok:
			t.Errorf("%s row %d (%q) missing after recovery", k.side, k.row, w.id)
		case !reflect.DeepEqual(g, w):
			t.Errorf("%s row %d differs:\n got  %+v\n want %+v", k.side, k.row, g, w)
		default:
			continue
		}
		if bad++; bad > 5 {
			t.Fatal("too many differences")
		}
	}
	for k := range got {
		if _, ok := want[k]; !ok {
			t.Errorf("%s row %d recovered but not live", k.side, k.row)
		}
	}
}

// sameMeta fails t unless got equals want (both as JSON, which is what the
// files hold).
func sameMeta(t *testing.T, got, want *online.Meta) {
	t.Helper()
	if (got == nil) != (want == nil) {
		t.Fatalf("meta = %v, want %v", got, want)
	}
	if got == nil {
		return
	}
	if !reflect.DeepEqual(got, want) {
		gj, _ := json.Marshal(got)
		wj, _ := json.Marshal(want)
		t.Fatalf("meta differs:\n got  %s\n want %s", gj, wj)
	}
}

// sim drives a Store the way the trainer does, with random rows, and keeps
// the expected state.
type sim struct {
	t    *testing.T
	rng  *rand.Rand
	rank int
	live state
	seq  uint64
	meta *online.Meta
	// nextRow is the high-water row per side; freed rows are reused.
	nextRow [2]int32
}

func newSim(t *testing.T, seed uint64, rank int) *sim {
	return &sim{t: t, rng: rand.New(rand.NewPCG(seed, 0x5eed)), rank: rank, live: state{}}
}

// randFloat returns a random finite float32, any bit pattern (subnormals,
// negative zero): recovery must keep the bits.
func (m *sim) randFloat() float32 {
	for {
		x := math.Float32frombits(m.rng.Uint32())
		if !math.IsNaN(float64(x)) && !math.IsInf(float64(x), 0) {
			return x
		}
	}
}

// changes makes n random changes (new rows, overwrites, deletions) and returns
// them as a RowSet; live follows.
func (m *sim) changes(n int) *online.RowSet {
	rs := new(online.RowSet)
	rs.Reset(m.rank)
	for range n {
		side := online.Side(m.rng.IntN(2))
		var r int32
		if m.nextRow[side] > 0 && m.rng.IntN(3) > 0 {
			r = m.rng.Int32N(m.nextRow[side])
		} else {
			r = m.nextRow[side]
			m.nextRow[side]++
		}
		k := key{side, r}
		old, exists := m.live[k]
		if exists && m.rng.IntN(5) == 0 {
			rec := online.RowRecord{Side: side, Row: r, ID: []byte(old.id), Deleted: true}
			rs.Append(rec)
			m.live.apply(&rec)
			continue
		}
		id := old.id
		if !exists {
			id = fmt.Sprintf("%s-%d-%d", side, r, m.rng.IntN(1000))
		}
		vec := make([]float32, m.rank)
		for i := range vec {
			vec[i] = m.randFloat()
		}
		rec := online.RowRecord{Side: side, Row: r, ID: []byte(id), Bias: m.randFloat(),
			Count: m.rng.Uint32(), Last: m.rng.Int64(), Epoch: m.rng.Uint32N(4), Vec: vec}
		rs.Append(rec)
		m.live.apply(&rec)
	}
	return rs
}

// nextMeta returns the meta of the next cut.
func (m *sim) nextMeta() *online.Meta {
	m.seq++
	meta := &online.Meta{
		Format: online.MetaFormat, Rank: m.rank, Mode: "explicit", Seq: m.seq,
		Position: stream.Position{Source: "kafka", Topic: "plays",
			Partitions: []stream.PartitionOffset{{Partition: 0, Next: int64(m.seq * 10)}, {Partition: 1, Next: int64(m.seq * 7)}}},
		Time:   int64(1_700_000_000_000 + m.seq),
		Counts: online.Counts{Applied: m.seq * 100, Rejected: m.seq},
		Model: online.ModelMeta{MeanSum: 3.5 * float64(m.seq), MeanN: float64(m.seq), Next: m.nextRow,
			Tombstones: []string{fmt.Sprintf("u%x", m.seq)}},
		Monitor: json.RawMessage(fmt.Sprintf(`{"window":%d}`, m.seq)),
	}
	m.meta = meta
	return meta
}

// appendN makes n changes and appends them.
func (m *sim) appendN(s *Store, n int) {
	m.t.Helper()
	if err := s.Append(m.changes(n), m.nextMeta()); err != nil {
		m.t.Fatalf("Append: %v", err)
	}
}

// snapshot runs a whole fuzzy snapshot: BeginSnapshot, the live rows in
// chunks with Appends in between (each chunk copied when it is written),
// a final Append, Commit.
func (m *sim) snapshot(s *Store, chunk int) {
	m.t.Helper()
	m.beginAndWrite(s, chunk)
	m.appendN(s, 3)
	if err := s.Commit(m.meta); err != nil {
		m.t.Fatalf("Commit: %v", err)
	}
}

// beginAndWrite runs a snapshot up to, not including, the final Append and
// Commit.
func (m *sim) beginAndWrite(s *Store, chunk int) {
	m.t.Helper()
	if err := s.BeginSnapshot(m.nextMeta()); err != nil {
		m.t.Fatalf("BeginSnapshot: %v", err)
	}
	keys := make([]key, 0, len(m.live))
	for k := range m.live {
		keys = append(keys, k)
	}
	sortKeys(keys)
	for i := 0; i < len(keys); i += chunk {
		rs := new(online.RowSet)
		rs.Reset(m.rank)
		for _, k := range keys[i:min(i+chunk, len(keys))] {
			if r, ok := m.live[k]; ok { // deleted since the key list was made
				rs.Append(r.record(k))
			}
		}
		if err := s.WriteRows(rs); err != nil {
			m.t.Fatalf("WriteRows: %v", err)
		}
		m.appendN(s, 4) // rows change while the snapshot is written
	}
}

func open(t *testing.T, dir string, keep int) *Store {
	t.Helper()
	s, err := Open(Options{Dir: dir, Keep: keep})
	if err != nil {
		t.Fatalf("Open: %v", err)
	}
	return s
}

// recoverDir opens dir, recovers it and returns the store, state, meta and info.
func recoverDir(t *testing.T, dir string, keep int) (*Store, state, *online.Meta, RecoverInfo) {
	t.Helper()
	s := open(t, dir, keep)
	got := state{}
	meta, info, err := s.Recover(got.apply)
	if err != nil {
		s.Close()
		t.Fatalf("Recover: %v", err)
	}
	return s, got, meta, info
}

// crashImage copies the files of dir (all but LOCK) into a new directory, as
// the disk would hold them if the process died now: data still in a bufio
// buffer is lost, data written to a file is kept.
func crashImage(t *testing.T, dir string) string {
	t.Helper()
	dst := t.TempDir()
	ents, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range ents {
		if e.Name() == lockName {
			continue
		}
		b, err := os.ReadFile(filepath.Join(dir, e.Name()))
		if err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(dst, e.Name()), b, 0o640); err != nil {
			t.Fatal(err)
		}
	}
	return dst
}

// files lists the checkpoint files of dir (all but LOCK), sorted.
func files(t *testing.T, dir string) []string {
	t.Helper()
	ents, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	var out []string
	for _, e := range ents {
		if e.Name() != lockName {
			out = append(out, e.Name())
		}
	}
	return out
}

func fileSize(t *testing.T, path string) int64 {
	t.Helper()
	st, err := os.Stat(path)
	if err != nil {
		t.Fatal(err)
	}
	return st.Size()
}

func hasSuffix(names []string, suffix string) bool {
	return slices.ContainsFunc(names, func(n string) bool { return strings.HasSuffix(n, suffix) })
}
