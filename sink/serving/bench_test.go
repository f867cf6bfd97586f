package serving

import (
	"context"
	"math/rand/v2"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/serving/reader"
)

// BenchmarkFlushVsRaw measures vectors flushed per second (k = 64) by the
// writer (Offer of 50,000 distinct rows, then Flush) against a raw go-redis
// loop that writes the same values with the same command shape (HSET of up to
// FieldsPerCommand fields per bucket key, RowsPerPipeline rows per pipeline)
// in the same run. Target: writer/raw >= 0.8.
func BenchmarkFlushVsRaw(b *testing.B) {
	addr := sharedRedis(b)
	prefix := testPrefix(b, addr)
	const k, n = 64, 50_000
	m := newFakeModel(n, 1, k, online.Explicit, 9)
	w := newWriter(b, Options{Addrs: []string{addr}, Prefix: prefix, Mode: online.Explicit, FlushInterval: time.Hour})
	// Publish an empty first version so Offers have a place to go.
	w.EndFull(&m.meta)
	waitFor(b, 10*time.Second, "first version", func() bool { return w.Status().Version != 0 })
	rs := new(online.RowSet)
	rs.Reset(k)
	for r := range int32(n) {
		rs.Append(m.record(0, r))
	}
	c := client(addr)
	defer c.Close()
	l, _ := reader.NewLayout(prefix + "-raw")
	enc := reader.EncodingFor(k, true)
	ctx := context.Background()
	rawWrite := func() {
		// Same grouping: by bucket, up to 1000 fields per HSET, 20,000 rows
		// per pipeline.
		groups := make([][]int32, DefaultBuckets)
		for i := range rs.Recs {
			bk := reader.BucketOfBytes(rs.Recs[i].ID, DefaultBuckets)
			groups[bk] = append(groups[bk], int32(i))
		}
		buf := make([]byte, 0, n*enc.ValueLen)
		p := c.Pipeline()
		in := 0
		for bk, g := range groups {
			for lo := 0; lo < len(g); lo += DefaultFieldsPerCommand {
				hi := min(lo+DefaultFieldsPerCommand, len(g))
				args := make([]any, 0, 2*(hi-lo))
				for _, i := range g[lo:hi] {
					r := &rs.Recs[i]
					s := len(buf)
					buf = enc.Encode(buf, r.Vec, r.Bias, reader.Trailer{Row: r.Row, Count: r.Count, Last: r.Last})
					args = append(args, r.ID, buf[s:len(buf):len(buf)])
				}
				p.HSet(ctx, l.Bucket(1, reader.SideUser, bk), args...)
				if in += hi - lo; in >= DefaultRowsPerPipeline {
					if _, err := p.Exec(ctx); err != nil {
						b.Fatal(err)
					}
					in = 0
				}
			}
		}
		if _, err := p.Exec(ctx); err != nil {
			b.Fatal(err)
		}
	}
	var tw, tr time.Duration
	writer := func() {
		w.Offer(rs, &m.meta)
		fctx, cancel := context.WithTimeout(ctx, time.Minute)
		defer cancel()
		if err := w.Flush(fctx); err != nil {
			b.Fatal(err)
		}
	}
	// One warm-up round each: buffers grown, connections open.
	writer()
	rawWrite()
	b.ResetTimer()
	for i := range b.N {
		// Alternate the order so neither side always runs after the other.
		for j := range 2 {
			t0 := time.Now()
			if (i+j)%2 == 0 {
				writer()
				tw += time.Since(t0)
			} else {
				rawWrite()
				tr += time.Since(t0)
			}
		}
	}
	b.StopTimer()
	wr := float64(n*b.N) / tw.Seconds()
	rr := float64(n*b.N) / tr.Seconds()
	b.ReportMetric(wr, "writer_vec/s")
	b.ReportMetric(rr, "raw_vec/s")
	b.ReportMetric(wr/rr, "writer/raw")
	b.ReportMetric(0, "ns/op")
}

// BenchmarkFreshness offers rows at a sustained 50,000 rows/s (500 every
// 10 ms; each b.N is one second of load) with the default 1 s flush interval,
// and reports the time from a row's Offer to Redis acknowledging its write
// (the writer's own histogram, p50/p99), cross-checked by an external poller
// that reads tracked rows' keys every 5 ms and notes when the new value
// appears. Target: p99 <= 1.5 × the flush interval.
func BenchmarkFreshness(b *testing.B) {
	addr := sharedRedis(b)
	prefix := testPrefix(b, addr)
	const k, users = 64, 200_000
	m := newFakeModel(users, 1, k, online.Explicit, 10)
	w := newWriter(b, Options{Addrs: []string{addr}, Prefix: prefix, Mode: online.Explicit})
	w.EndFull(&m.meta)
	waitFor(b, 10*time.Second, "first version", func() bool { return w.Status().Version != 0 })
	c := client(addr)
	defer c.Close()
	l, _ := reader.NewLayout(prefix)
	ver := w.Status().Version
	enc := reader.EncodingFor(k, true)

	// Tracked rows: the producer stamps Count = sequence number and records
	// the Offer time; the poller reads their keys.
	const tracked = 64
	var mu sync.Mutex
	offered := map[int32]map[uint32]time.Time{}
	var lat []time.Duration
	stop := make(chan struct{})
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { // external poller
		defer wg.Done()
		vec := make([]float32, k)
		ctx := context.Background()
		seen := map[int32]uint32{}
		for {
			select {
			case <-stop:
				return
			case <-time.After(5 * time.Millisecond):
			}
			p := c.Pipeline()
			cmds := make([]*redis.StringCmd, tracked)
			for i := range tracked {
				id := m.ids[0][i]
				cmds[i] = p.HGet(ctx, l.Bucket(ver, reader.SideUser, reader.BucketOf(id, DefaultBuckets)), id)
			}
			_, _ = p.Exec(ctx)
			now := time.Now()
			for i, cmd := range cmds {
				s, err := cmd.Result()
				if err != nil {
					continue
				}
				_, tr, err := enc.Decode(s, vec)
				if err != nil || tr.Count == seen[int32(i)] {
					continue
				}
				prev := seen[int32(i)]
				seen[int32(i)] = tr.Count
				// Latency from the first Offer since the previous write
				// seen: the earliest stamp in (prev, new].
				mu.Lock()
				var first time.Time
				for sq, at := range offered[int32(i)] {
					if sq > prev && sq <= tr.Count {
						if first.IsZero() || at.Before(first) {
							first = at
						}
						delete(offered[int32(i)], sq)
					}
				}
				if !first.IsZero() {
					lat = append(lat, now.Sub(first))
				}
				mu.Unlock()
			}
		}
	}()
	rng := rand.New(rand.NewPCG(11, 12))
	seq := uint32(0)
	rs := new(online.RowSet)
	b.ResetTimer()
	tick := time.NewTicker(10 * time.Millisecond)
	for range b.N * 100 {
		<-tick.C
		rs.Reset(k)
		now := time.Now()
		for j := range 500 {
			var r int32
			if j == 0 { // one tracked row per batch
				r = int32(rng.IntN(tracked))
			} else {
				r = tracked + int32(rng.IntN(users-tracked))
			}
			seq++
			rec := m.record(0, r)
			rec.Count = seq
			rs.Append(rec)
			if r < tracked {
				mu.Lock()
				if offered[r] == nil {
					offered[r] = map[uint32]time.Time{}
				}
				offered[r][seq] = now
				mu.Unlock()
			}
		}
		w.Offer(rs, &m.meta)
	}
	tick.Stop()
	fctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	_ = w.Flush(fctx)
	cancel()
	time.Sleep(50 * time.Millisecond)
	close(stop)
	wg.Wait()
	b.StopTimer()
	st := w.Status()
	b.ReportMetric(st.FreshP50.Seconds()*1000, "p50_ms")
	b.ReportMetric(st.FreshP99.Seconds()*1000, "p99_ms")
	mu.Lock()
	slices.Sort(lat)
	if len(lat) > 0 {
		b.ReportMetric(lat[len(lat)/2].Seconds()*1000, "poll_p50_ms")
		b.ReportMetric(lat[len(lat)*99/100].Seconds()*1000, "poll_p99_ms")
	}
	b.ReportMetric(float64(len(lat)), "poll_samples")
	mu.Unlock()
	b.ReportMetric(st.MaxFlushDuration.Seconds()*1000, "max_flush_ms")
	b.ReportMetric(0, "ns/op")
}
