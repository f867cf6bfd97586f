package online

import (
	"cmp"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
)

// sortedRanking ranks every item by a full sort: score descending, NaN
// last, ties by index ascending (the order TopN documents), written
// independently of rankAbove.
func sortedRanking(scores []float32) []int32 {
	idx := make([]int32, len(scores))
	for i := range idx {
		idx[i] = int32(i)
	}
	slices.SortFunc(idx, func(a, b int32) int {
		sa, sb := scores[a], scores[b]
		na, nb := math.IsNaN(float64(sa)), math.IsNaN(float64(sb))
		if na != nb {
			if na {
				return 1
			}
			return -1
		}
		if !na && sa != sb {
			return cmp.Compare(sb, sa)
		}
		return cmp.Compare(a, b)
	})
	return idx
}

func randomScores(rng *rand.Rand, n int) []float32 {
	s := make([]float32, n)
	for i := range s {
		switch rng.IntN(10) {
		case 0: // coarse values give many ties
			s[i] = float32(rng.IntN(5))
		case 1:
			s[i] = float32(math.NaN())
		case 2:
			s[i] = float32(math.Inf(2*rng.IntN(2) - 1))
		default:
			s[i] = float32(rng.NormFloat64())
		}
	}
	return s
}

func TestTopNMatchesSort(t *testing.T) {
	rng := rand.New(rand.NewPCG(21, 22))
	for trial := range 200 {
		items := 1 + rng.IntN(500)
		scores := randomScores(rng, items)
		full := sortedRanking(scores)
		for _, n := range []int{1, 2, 10, items - 1, items, items + 5} {
			if n < 1 {
				continue
			}
			got := TopN(scores, n, nil)
			want := full[:min(n, items)]
			if !slices.Equal(got, want) {
				t.Fatalf("trial %d, %d items, n %d: TopN %v, sort %v", trial, items, n, got, want)
			}
			in := make(map[int32]bool, len(got))
			for _, i := range got {
				in[i] = true
			}
			for target := range int32(items) {
				if InTopN(scores, target, n) != in[target] {
					t.Fatalf("trial %d, n %d: InTopN(%d) = %v, TopN membership %v",
						trial, n, target, !in[target], in[target])
				}
			}
		}
	}
}

func TestTopNEdges(t *testing.T) {
	scores := []float32{3, 1, 3, 2}
	if got := TopN(scores, 0, nil); len(got) != 0 {
		t.Errorf("n = 0: %v, want empty", got)
	}
	if got := TopN(nil, 3, nil); len(got) != 0 {
		t.Errorf("no items: %v, want empty", got)
	}
	// Ties go to the lower index: 0 before 2.
	if got := TopN(scores, 3, make([]int32, 7)); !slices.Equal(got, []int32{0, 2, 3}) {
		t.Errorf("TopN = %v, want [0 2 3]", got)
	}
	if InTopN(scores, 2, 1) || !InTopN(scores, 2, 2) || !InTopN(scores, 0, 1) {
		t.Error("InTopN does not resolve the tie at score 3 in favour of index 0")
	}
	if InTopN(scores, -1, 4) || InTopN(scores, 4, 4) || InTopN(scores, 0, 0) {
		t.Error("InTopN true for an out-of-range target or n = 0")
	}
}

func TestTopNDoesNotAllocate(t *testing.T) {
	rng := rand.New(rand.NewPCG(23, 24))
	scores := randomScores(rng, 10_000)
	dst := make([]int32, 0, 20)
	if n := testing.AllocsPerRun(50, func() { dst = TopN(scores, 20, dst) }); n != 0 {
		t.Errorf("TopN allocates %.0f times with capacity, want 0", n)
	}
	if n := testing.AllocsPerRun(50, func() { InTopN(scores, 77, 20) }); n != 0 {
		t.Errorf("InTopN allocates %.0f times, want 0", n)
	}
}

func BenchmarkTopN(b *testing.B) {
	rng := rand.New(rand.NewPCG(1, 1))
	scores := make([]float32, 100_000)
	for i := range scores {
		scores[i] = float32(rng.NormFloat64())
	}
	dst := make([]int32, 0, 10)
	for b.Loop() {
		dst = TopN(scores, 10, dst)
	}
}

func BenchmarkInTopN(b *testing.B) {
	rng := rand.New(rand.NewPCG(1, 1))
	scores := make([]float32, 100_000)
	for i := range scores {
		scores[i] = float32(rng.NormFloat64())
	}
	// The worst case: the target is the best item, so every item is
	// compared (a low-ranked target stops after n items above it).
	best := TopN(scores, 1, nil)[0]
	for b.Loop() {
		InTopN(scores, best, 10)
	}
}
