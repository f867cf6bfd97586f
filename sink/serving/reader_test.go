package serving

import (
	"context"
	"math"
	"os/exec"
	"sort"
	"strconv"
	"strings"
	"testing"
	"time"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/serving/reader"
)

// publishSmall writes a small explicit model and returns it with the prefix.
func publishSmall(t *testing.T, addr string, mode online.Mode) (*fakeModel, string) {
	prefix := testPrefix(t, addr)
	m := newFakeModel(200, 300, 16, mode, 8)
	w := newWriter(t, Options{Addrs: []string{addr}, Prefix: prefix, Mode: mode, Buckets: 32})
	publishFull(t, w, m)
	waitFor(t, 10*time.Second, "published", func() bool { return w.Status().Version != 0 })
	return m, prefix
}

// expected scores straight from the model tables: the formula written again,
// independently of reader.Score, in float64.
func expectedTop(m *fakeModel, user int, items []int, n int) []reader.Scored {
	var out []reader.Scored
	for _, i := range items {
		var s float64
		for j := range m.k {
			s += float64(m.vecs[0][user][j]) * float64(m.vecs[1][i][j])
		}
		if m.mode == online.Explicit {
			s = 3.5 + float64(m.bias[0][user]) + float64(m.bias[1][i]) + s
		}
		out = append(out, reader.Scored{Item: m.ids[1][i], Score: s})
	}
	sort.SliceStable(out, func(a, b int) bool {
		if out[a].Score != out[b].Score {
			return out[a].Score > out[b].Score
		}
		return out[a].Item < out[b].Item
	})
	return out[:min(n, len(out))]
}

func TestReaderTopN(t *testing.T) {
	addr := sharedRedis(t)
	for _, mode := range []online.Mode{online.Explicit, online.Implicit} {
		t.Run(mode.String(), func(t *testing.T) {
			m, prefix := publishSmall(t, addr, mode)
			c := client(addr)
			defer c.Close()
			rd, err := reader.New(c, reader.Options{Prefix: prefix})
			if err != nil {
				t.Fatal(err)
			}
			var cands []string
			var idx []int
			for i := 0; i < 300; i += 3 {
				cands = append(cands, m.ids[1][i])
				idx = append(idx, i)
			}
			cands = append(cands, "show-unknown")
			rk, err := rd.TopN(context.Background(), m.ids[0][17], cands, 10)
			if err != nil {
				t.Fatal(err)
			}
			want := expectedTop(m, 17, idx, 10)
			if len(rk.Top) != 10 || len(rk.Missing) != 1 || rk.Missing[0] != "show-unknown" {
				t.Fatalf("top %d, missing %v", len(rk.Top), rk.Missing)
			}
			for i := range want {
				// Same float64 operations in the same order: equal to round-off
				// of a few ulps at most.
				if rk.Top[i].Item != want[i].Item || math.Abs(rk.Top[i].Score-want[i].Score) > 1e-12 {
					t.Fatalf("rank %d: %+v, want %+v", i, rk.Top[i], want[i])
				}
			}
			if _, err := rd.TopN(context.Background(), "listener-nobody", cands, 5); err == nil || !strings.Contains(err.Error(), "not found") {
				t.Fatalf("unknown user: %v", err)
			}
		})
	}
}

// TestPythonReader runs reader.py against the real server and compares its
// ranking and scores with the Go reader's.
func TestPythonReader(t *testing.T) {
	addr := sharedRedis(t)
	py, err := exec.LookPath("python3")
	if err != nil {
		t.Skip("python3 not installed")
	}
	m, prefix := publishSmall(t, addr, online.Explicit)
	c := client(addr)
	defer c.Close()
	rd, _ := reader.New(c, reader.Options{Prefix: prefix})
	cands := []string{}
	for i := 0; i < 300; i += 7 {
		cands = append(cands, m.ids[1][i])
	}
	user := m.ids[0][5]
	rk, err := rd.TopN(context.Background(), user, cands, 8)
	if err != nil {
		t.Fatal(err)
	}
	host, port, _ := strings.Cut(addr, ":")
	args := append([]string{"reader.py", host, port, prefix, user, "8"}, cands...)
	out, err := exec.Command(py, args...).CombinedOutput()
	if err != nil {
		t.Fatalf("python3 reader.py: %v\n%s", err, out)
	}
	lines := strings.Split(strings.TrimSpace(string(out)), "\n")
	if len(lines) != len(rk.Top) {
		t.Fatalf("python gave %d lines, Go %d:\n%s", len(lines), len(rk.Top), out)
	}
	for i, ln := range lines {
		item, s, _ := strings.Cut(ln, " ")
		score, err := strconv.ParseFloat(s, 64)
		if err != nil {
			t.Fatalf("python line %q: %v", ln, err)
		}
		// Both sum the float64 products in index order and add μ + b_u + b_i:
		// the same IEEE operations, so a tight tolerance.
		if item != rk.Top[i].Item || math.Abs(score-rk.Top[i].Score) > 1e-12 {
			t.Fatalf("rank %d: python %s %v, Go %s %v", i, item, score, rk.Top[i].Item, rk.Top[i].Score)
		}
	}
}
