package kafka

import (
	"context"
	"sync"
	"testing"

	"freshet.dev/freshet/stream"
)

var (
	benchOnce  sync.Once
	benchOpts  Options
	benchTotal int
)

// benchTopic produces the benchmark's records once per test binary.
func benchTopic(b *testing.B) (Options, int) {
	broker := brokerFrom(b, envBroker)
	benchOnce.Do(func() {
		const n, parts = 200_000, 2
		o := testOptions(b, broker, parts)
		o.Logger = nil
		mustEnsure(b, o)
		produce(b, o, n)
		benchOpts, benchTotal = o, n
	})
	if benchTotal == 0 {
		b.Fatal("benchmark topic setup failed")
	}
	return benchOpts, benchTotal
}

// BenchmarkConsume reads the whole benchmark topic through a fresh group
// each iteration, committing after every batch: "raw" adds a fixed event per
// record without parsing (the consume-only baseline), "json" decodes with the
// stream JSON decoder. The timer covers the first batch to the last; joining
// the group is left out. Reports records/s and the commits actually sent
// (a commit that would not move any partition, for example one held back by
// a dead letter awaiting its acknowledgement, is not sent): on loopback each
// synchronous commit costs about a millisecond, so commits per batch dominate
// the raw loop, and the commit-every-32 variants show the read path itself.
func BenchmarkConsume(b *testing.B) {
	for _, c := range []struct {
		name  string
		dec   func() stream.Decoder
		every int // commit after this many batches
	}{
		{"raw/commit-every-batch", func() stream.Decoder { return rawDecoder{} }, 1},
		{"json/commit-every-batch", jsonDecoder, 1},
		{"raw/commit-every-32", func() stream.Decoder { return rawDecoder{} }, 32},
		{"json/commit-every-32", jsonDecoder, 32},
	} {
		b.Run(c.name, func(b *testing.B) {
			base, n := benchTopic(b)
			ctx := context.Background()
			var records int
			var commits int64
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				b.StopTimer()
				o := base
				_, _, o.GroupID = names(b)
				o.NewDecoder = c.dec
				src := mustNew(b, o, stream.Position{})
				got := 0
				first := true
				batches := 0
				for got < n {
					bt, err := src.Next(ctx)
					if err != nil {
						b.Fatal(err)
					}
					if first && bt.Len()+bt.Rejected > 0 {
						b.StartTimer()
						first = false
					}
					got += bt.Len() + bt.Rejected
					batches++
					if batches%c.every == 0 || got >= n {
						if err := src.Commit(ctx, bt.Pos); err != nil {
							b.Fatal(err)
						}
					}
				}
				b.StopTimer()
				records += got
				commits += src.Stats().Commits
				if err := src.Close(); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(records)/b.Elapsed().Seconds(), "records/s")
			b.ReportMetric(float64(commits)/float64(b.N), "commits/op")
			b.ReportMetric(0, "ns/op")
		})
	}
}
