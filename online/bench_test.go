package online

import (
	"fmt"
	"math/rand/v2"
	"runtime"
	"testing"
)

// benchModel returns an explicit model with nu users and ni items filled
// with small random factors. Rows are allocated directly (no IDs) so the
// 2M-row setup stays quick.
func benchModel(b *testing.B, k, nu, ni int) *Model {
	m, err := New(Options{Rank: k, Seed: 1})
	if err != nil {
		b.Fatal(err)
	}
	r := rand.New(rand.NewPCG(1, 2))
	for s, n := range [2]int{nu, ni} {
		t := &m.tab[s]
		for range n {
			v := t.row(t.alloc())
			for f := range v {
				v[f] = float32(r.Float64()-0.5) * 0.2
			}
		}
	}
	return m
}

type benchEvent struct {
	u, i int32
	v    float64
}

// benchGroup fills g with random events; drawing them costs the same in
// every variant, and random rows stay random however long the run.
func benchGroup(r *rand.PCG, g *[16]benchEvent, nu, ni int) {
	for j := range g {
		x := r.Uint64()
		g[j] = benchEvent{int32((x >> 32) % uint64(nu)), int32((x & 0xffffffff) % uint64(ni)), float64(1 + x>>61)}
	}
}

// BenchmarkStep measures one explicit SGD step at rank k with tables in
// cache (1k × 1k) and out of cache (2M users × 200k items, random rows), for
// the reference loops, the fast kernels, and the fast kernels with the rows
// of the next group of 16 events touched (prefetched, on amd64) before the
// current group is stepped, so that their loads overlap the steps. The
// reference variant is the plain scalar loops, always on the guarded path
// (row copies and a checked update).
func BenchmarkStep(b *testing.B) {
	for _, k := range []int{16, 32, 64, 128} {
		b.Run(fmt.Sprintf("k=%d", k), func(b *testing.B) {
			for _, size := range []struct {
				name   string
				nu, ni int
			}{{"cache", 1000, 1000}, {"big", 2_000_000, 200_000}} {
				b.Run(size.name, func(b *testing.B) {
					if size.nu > 1000 && testing.Short() {
						b.Skip("big tables skipped in -short")
					}
					m := benchModel(b, k, size.nu, size.ni)
					for _, v := range []struct {
						name  string
						kern  kernels
						touch bool
					}{{"ref", refKernels, false}, {"fast", fastKernels, false}, {"fast+touch", fastKernels, true}} {
						b.Run(v.name, func(b *testing.B) {
							m.kern = v.kern
							r := rand.NewPCG(3, 4)
							var cur, next [16]benchEvent
							benchGroup(r, &cur, size.nu, size.ni)
							b.ResetTimer()
							n := 0
							for n < b.N {
								// Draw the next group; with touch, start its
								// loads before stepping the current group.
								benchGroup(r, &next, size.nu, size.ni)
								if v.touch {
									for _, e := range next {
										m.Touch(e.u, e.i)
									}
								}
								for _, e := range cur {
									if _, err := m.Step(e.u, e.i, e.v, 0); err != nil {
										b.Fatal(err)
									}
								}
								cur = next
								n += 16
							}
							b.ReportMetric(float64(n)/b.Elapsed().Seconds(), "events/s")
						})
					}
					m.kern = fastKernels
					runtime.KeepAlive(m)
				})
				runtime.GC() // let the big tables go before the next rank
			}
		})
	}
}

// BenchmarkIndex builds an ID index of 2M IDs (200k in -short), reports its
// Go-heap bytes per ID (runtime.MemStats, after GC), and measures lookups of
// known IDs; "map" does the same with map[string]int32 for comparison.
func BenchmarkIndex(b *testing.B) {
	n := 2_000_000
	if testing.Short() {
		n = 200_000
	}
	ids := make([][]byte, n)
	for j := range ids {
		ids[j] = fmt.Appendf(nil, "listener-%07d", j)
	}
	order := rand.New(rand.NewPCG(5, 6)).Perm(n)
	heap := func() uint64 {
		runtime.GC()
		var ms runtime.MemStats
		runtime.ReadMemStats(&ms)
		return ms.HeapAlloc
	}
	b.Run("lean", func(b *testing.B) {
		before := heap()
		x := newIndex()
		for j, id := range ids {
			x.insert(id, int32(j))
		}
		after := heap()
		b.ResetTimer()
		j := 0
		for b.Loop() {
			if _, ok := x.find(ids[order[j%n]]); !ok {
				b.Fatal("lost an ID")
			}
			j++
		}
		b.ReportMetric(float64(after-before)/float64(n), "B/ID")
		runtime.KeepAlive(&x)
	})
	b.Run("map", func(b *testing.B) {
		before := heap()
		x := make(map[string]int32)
		for j, id := range ids {
			x[string(id)] = int32(j)
		}
		after := heap()
		b.ResetTimer()
		j := 0
		for b.Loop() {
			if _, ok := x[string(ids[order[j%n]])]; !ok {
				b.Fatal("lost an ID")
			}
			j++
		}
		b.ReportMetric(float64(after-before)/float64(n), "B/ID")
		runtime.KeepAlive(x)
	})
}

// BenchmarkScoresTo scores every item for one user (the prequential top-N
// check), 200k items at k = 64.
func BenchmarkScoresTo(b *testing.B) {
	m := benchModel(b, 64, 10, 200_000)
	dst := make([]float32, 0, 200_000)
	for b.Loop() {
		dst = m.ScoresTo(dst, 3)
	}
	b.ReportMetric(float64(200_000*b.N)/b.Elapsed().Seconds(), "items/s")
}

// BenchmarkKernels times the inner loops alone on rows in cache.
func BenchmarkKernels(b *testing.B) {
	r := rand.New(rand.NewPCG(7, 8))
	for _, k := range []int{16, 64, 128} {
		p, q := randVec(r, k), randVec(r, k)
		var sink float32
		for _, v := range []struct {
			name string
			kern kernels
		}{{"ref", refKernels}, {"unrolled", kernels{dot: dotUnrolled, update: updateUnrolled}}, {"fast", fastKernels}} {
			b.Run(fmt.Sprintf("dot/k=%d/%s", k, v.name), func(b *testing.B) {
				for b.Loop() {
					sink += v.kern.dot(p, q)
				}
			})
			b.Run(fmt.Sprintf("update/k=%d/%s", k, v.name), func(b *testing.B) {
				for b.Loop() {
					// a1 = 1, b1 = 0: values stay put, so the loop can run forever.
					sink += v.kern.update(p, q, 1, 0, 1, 0)
				}
			})
		}
		runtime.KeepAlive(sink)
	}
}

// BenchmarkStepImplicit measures implicit steps at k = 64 on 1k × 1k tables:
// pointwise, pointwise with 4 sampled negatives, and BPR with 1 negative.
func BenchmarkStepImplicit(b *testing.B) {
	for _, v := range []struct {
		name string
		o    Options
	}{
		{"pointwise", Options{Rank: 64, Mode: Implicit}},
		{"negatives=4", Options{Rank: 64, Mode: Implicit, Negatives: 4}},
		{"bpr", Options{Rank: 64, Mode: Implicit, Pairwise: true}},
	} {
		b.Run(v.name, func(b *testing.B) {
			m, err := New(v.o)
			if err != nil {
				b.Fatal(err)
			}
			for s := range m.tab {
				for range 1000 {
					m.initRow(Side(s), m.tab[s].row(m.tab[s].alloc()), []byte("x"))
				}
			}
			r := rand.NewPCG(5, 6)
			var g [16]benchEvent
			n := 0
			for n < b.N {
				benchGroup(r, &g, 1000, 1000)
				for _, e := range g {
					if _, err := m.Step(e.u, e.i, 1, 0); err != nil {
						b.Fatal(err)
					}
				}
				n += 16
			}
			b.ReportMetric(float64(n)/b.Elapsed().Seconds(), "events/s")
		})
	}
}
