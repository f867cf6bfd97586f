package checkpoint

import (
	"flag"
	"fmt"
	"math/rand/v2"
	"testing"

	"freshet.dev/freshet/online"
)

// Benchmark sizes. The defaults are small enough for a smoke run; the full
// size from the design brief is
//
//	go test ./sink/checkpoint -run '^$' -bench SnapshotWrite -benchtime 3x \
//	    -checkpoint.users 2000000 -checkpoint.items 200000 -checkpoint.rank 64
var (
	benchUsers = flag.Int("checkpoint.users", 20000, "users in BenchmarkSnapshotWrite")
	benchItems = flag.Int("checkpoint.items", 2000, "items in BenchmarkSnapshotWrite")
	benchRank  = flag.Int("checkpoint.rank", 64, "rank k in the checkpoint benchmarks")
	benchDir   = flag.String("checkpoint.dir", "", "directory for benchmark files (default: a temporary directory)")
)

const benchChunk = 4096

// benchRows returns a RowSet of n random rows at rank k, IDs 12 bytes long
// like "listener-123".
func benchRows(n, k int) *online.RowSet {
	rng := rand.New(rand.NewPCG(1, 2))
	rs := new(online.RowSet)
	rs.Reset(k)
	vec := make([]float32, k)
	for i := range n {
		for j := range vec {
			vec[j] = float32(rng.NormFloat64() * 0.1)
		}
		rs.Append(online.RowRecord{Side: online.Users, Row: int32(i), ID: fmt.Appendf(nil, "listener-%03d", i%1000),
			Bias: float32(rng.NormFloat64()), Count: rng.Uint32N(500), Last: 1_700_000_000_000 + int64(i), Vec: vec})
	}
	return rs
}

func benchStore(b *testing.B) *Store {
	dir := *benchDir
	if dir == "" {
		dir = b.TempDir()
	}
	s, err := Open(Options{Dir: dir})
	if err != nil {
		b.Fatal(err)
	}
	if _, _, err := s.Recover(func(*online.RowRecord) error { return nil }); err != nil {
		b.Fatal(err)
	}
	return s
}

// BenchmarkSnapshotWrite writes a whole snapshot of users+items rows (one
// BeginSnapshot, WriteRows in chunks of 4096, an empty Append, Commit with
// its fsyncs and rename) and reports bytes per second and ns per row.
func BenchmarkSnapshotWrite(b *testing.B) {
	k := *benchRank
	total := *benchUsers + *benchItems
	chunk := benchRows(benchChunk, k)
	s := benchStore(b)
	defer s.Close()
	meta := &online.Meta{Format: online.MetaFormat, Rank: k}
	var bytes int64
	b.ResetTimer()
	for i := range b.N {
		meta.Seq = uint64(i + 1)
		if err := s.BeginSnapshot(meta); err != nil {
			b.Fatal(err)
		}
		for done := 0; done < total; done += benchChunk {
			n := min(benchChunk, total-done)
			chunk.Recs = chunk.Recs[:n]
			for j := range chunk.Recs {
				r := done + j
				chunk.Recs[j].Side, chunk.Recs[j].Row = online.Users, int32(r)
				if r >= *benchUsers {
					chunk.Recs[j].Side, chunk.Recs[j].Row = online.Items, int32(r-*benchUsers)
				}
			}
			if err := s.WriteRows(chunk); err != nil {
				b.Fatal(err)
			}
			chunk.Recs = chunk.Recs[:cap(chunk.Recs)]
		}
		bytes = s.snap.off
		if err := s.Append(nil, meta); err != nil {
			b.Fatal(err)
		}
		if err := s.Commit(meta); err != nil {
			b.Fatal(err)
		}
	}
	b.StopTimer()
	b.SetBytes(bytes)
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(total), "ns/row")
	b.ReportMetric(float64(total), "rows")
}

// BenchmarkAppend appends records of rows changed rows each, fsync included.
func BenchmarkAppend(b *testing.B) {
	for _, rows := range []int{1, 1000} {
		b.Run(fmt.Sprintf("rows=%d", rows), func(b *testing.B) {
			rs := benchRows(rows, *benchRank)
			s := benchStore(b)
			defer s.Close()
			meta := &online.Meta{Format: online.MetaFormat, Rank: *benchRank}
			b.ReportAllocs()
			b.ResetTimer()
			for i := range b.N {
				meta.Seq = uint64(i + 1)
				if err := s.Append(rs, meta); err != nil {
					b.Fatal(err)
				}
			}
			b.SetBytes(int64(len(s.rec)))
		})
	}
}

// BenchmarkRecover reads back one snapshot of users+items rows (verify pass
// and apply pass) plus its log.
func BenchmarkRecover(b *testing.B) {
	k := *benchRank
	total := *benchUsers + *benchItems
	dir := *benchDir
	if dir == "" {
		dir = b.TempDir()
	}
	s, err := Open(Options{Dir: dir})
	if err != nil {
		b.Fatal(err)
	}
	if _, _, err := s.Recover(func(*online.RowRecord) error { return nil }); err != nil {
		b.Fatal(err)
	}
	meta := &online.Meta{Format: online.MetaFormat, Rank: k, Seq: 1}
	chunk := benchRows(benchChunk, k)
	if err := s.BeginSnapshot(meta); err != nil {
		b.Fatal(err)
	}
	for done := 0; done < total; done += benchChunk {
		n := min(benchChunk, total-done)
		for j := range chunk.Recs[:n] {
			chunk.Recs[j].Row = int32(done + j)
		}
		part := *chunk
		part.Recs = chunk.Recs[:n]
		if err := s.WriteRows(&part); err != nil {
			b.Fatal(err)
		}
	}
	if err := s.Append(nil, meta); err != nil {
		b.Fatal(err)
	}
	if err := s.Commit(meta); err != nil {
		b.Fatal(err)
	}
	s.Close()
	b.ResetTimer()
	for range b.N {
		s, err := Open(Options{Dir: dir})
		if err != nil {
			b.Fatal(err)
		}
		n := 0
		if _, info, err := s.Recover(func(*online.RowRecord) error { n++; return nil }); err != nil || n != total {
			b.Fatalf("recovered %d rows (info %+v), want %d: %v", n, info, total, err)
		}
		s.Close()
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(total), "ns/row")
}
