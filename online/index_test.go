package online

import (
	"fmt"
	"math/rand/v2"
	"testing"
)

// TestIndexAgainstMap runs random inserts, finds and removals against a Go
// map as the oracle, with enough churn to exercise resizing and the
// backward-shift deletion.
func TestIndexAgainstMap(t *testing.T) {
	r := rand.New(rand.NewPCG(7, 7))
	x := newIndex()
	oracle := map[string]int32{}
	var free []int32
	next := int32(0)
	for op := 0; op < 200000; op++ {
		id := fmt.Sprintf("listener-%d", r.IntN(20000))
		switch r.IntN(3) {
		case 0, 1: // insert if absent
			if _, ok := oracle[id]; ok {
				continue
			}
			var row int32
			if len(free) > 0 {
				row, free = free[len(free)-1], free[:len(free)-1]
			} else {
				row = next
				next++
			}
			x.insert([]byte(id), row)
			oracle[id] = row
		case 2:
			row, ok := x.remove([]byte(id))
			want, had := oracle[id]
			if ok != had || (ok && row != want) {
				t.Fatalf("op %d remove %q = %d,%v, want %d,%v", op, id, row, ok, want, had)
			}
			if ok {
				delete(oracle, id)
				free = append(free, row)
				if got := x.id(row); got != nil {
					t.Fatalf("removed row %d still has ID %q", row, got)
				}
			}
		}
		if op%1000 == 0 || op > 199000 {
			if x.n != len(oracle) {
				t.Fatalf("op %d: index holds %d, oracle %d", op, x.n, len(oracle))
			}
		}
	}
	for id, want := range oracle {
		got, ok := x.find([]byte(id))
		if !ok || got != want {
			t.Fatalf("find %q = %d,%v, want %d", id, got, ok, want)
		}
		if back := string(x.id(want)); back != id {
			t.Fatalf("row %d -> %q, want %q", want, back, id)
		}
	}
	for k := 20000; k < 21000; k++ {
		if _, ok := x.find([]byte(fmt.Sprintf("listener-%d", k))); ok {
			t.Fatalf("found an ID never inserted")
		}
	}
}

func TestIndexRemoveZeroesID(t *testing.T) {
	x := newIndex()
	x.insert([]byte("show-secret"), 0)
	b := x.id(0)
	x.remove([]byte("show-secret"))
	for _, c := range b {
		if c != 0 {
			t.Fatalf("erased ID bytes left in the arena: %q", b)
		}
	}
}

func TestIndexLookupDoesNotAllocate(t *testing.T) {
	x := newIndex()
	ids := make([][]byte, 1000)
	for j := range ids {
		ids[j] = fmt.Appendf(nil, "show-%d", j)
		x.insert(ids[j], int32(j))
	}
	j := 0
	if n := testing.AllocsPerRun(1000, func() {
		if _, ok := x.find(ids[j%1000]); !ok {
			t.Fatal("lost an ID")
		}
		j++
	}); n != 0 {
		t.Fatalf("find allocates %v times, want 0", n)
	}
}
