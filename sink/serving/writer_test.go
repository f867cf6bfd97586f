package serving

import (
	"bytes"
	"context"
	"strings"
	"testing"
	"time"

	"freshet.dev/freshet/online"
)

func rec(side online.Side, row int32, id string, x float32) online.RowRecord {
	return online.RowRecord{Side: side, Row: row, ID: []byte(id), Vec: []float32{x, x + 1}, Count: uint32(x)}
}

func TestPendingCoalesces(t *testing.T) {
	p := newPending(2)
	for i := range 1000 {
		r := rec(online.Users, 5, "listener-5", float32(i))
		p.put(&r, int64(100+i))
	}
	r := rec(online.Items, 5, "show-5", 7) // same row index, other side
	p.put(&r, 1)
	if p.rows() != 2 {
		t.Fatalf("%d pending rows, want 2 (coalesced)", p.rows())
	}
	u := &p.recs[0]
	if got := p.vec(u); got[0] != 999 || got[1] != 1000 || u.count != 999 {
		t.Fatalf("kept %v count %d, want the newest copy (999)", got, u.count)
	}
	if u.since != 100 {
		t.Fatalf("since %d, want the first dirtying time 100", u.since)
	}
	// Erasure drops the pending write and queues a delete; a reused row
	// with a new ID is a fresh entry.
	p.del(online.Users, 5, []byte("listener-5"))
	if !p.recs[0].dead || len(p.dels) != 1 || !bytes.Equal(p.id(p.dels[0].idOff, p.dels[0].idLen), []byte("listener-5")) {
		t.Fatalf("after del: dead %v dels %d", p.recs[0].dead, len(p.dels))
	}
	r = rec(online.Users, 5, "listener-new", 3)
	p.put(&r, 500)
	if p.recs[0].dead || string(p.id(p.recs[0].idOff, p.recs[0].idLen)) != "listener-new" || p.recs[0].since != 500 {
		t.Fatalf("reused row: %+v", p.recs[0])
	}

	// mergeOlder keeps newer copies and restores missing ones and deletes.
	old := newPending(2)
	a := rec(online.Users, 5, "listener-new", 1) // older copy of a row p has
	b := rec(online.Users, 9, "listener-9", 2)   // a row p lacks
	old.put(&a, 1)
	old.put(&b, 2)
	old.del(online.Items, 3, []byte("show-3"))
	p.mergeOlder(old)
	if p.rows() != 3 || p.vec(&p.recs[0])[0] != 3 || len(p.dels) != 2 {
		t.Fatalf("merge: rows %d first %v dels %d", p.rows(), p.vec(&p.recs[0]), len(p.dels))
	}
	p.reset(2)
	if !p.empty() || p.slot[0][5] != 0 || p.slot[0][9] != 0 {
		t.Fatal("reset left entries")
	}
}

// TestOfferDoesNotAllocate: the trainer's hand-off is allocation-free once the
// tables have grown. The address is a closed loopback port, so the flusher
// only fails in the background.
func TestOfferDoesNotAllocate(t *testing.T) {
	w, err := New(Options{Addrs: []string{"127.0.0.1:1"}, Mode: online.Explicit, FlushInterval: time.Hour})
	if err != nil {
		t.Fatal(err)
	}
	defer closeQuick(w)
	rs := new(online.RowSet)
	rs.Reset(64)
	vec := make([]float32, 64)
	for r := range int32(1000) {
		rs.Append(online.RowRecord{Side: online.Side(r & 1), Row: r, ID: []byte("listener-x"), Vec: vec})
	}
	meta := &online.Meta{Rank: 64, Mode: "explicit", Model: online.ModelMeta{Free: [2][]int32{{1, 2}, nil}, Recent: []int32{4, 5, 6}}}
	w.Offer(rs, meta) // warm up
	w.OfferFull(rs)
	if a := testing.AllocsPerRun(200, func() { w.Offer(rs, meta); w.OfferFull(rs) }); a != 0 {
		t.Fatalf("Offer+OfferFull allocate %v times per call", a)
	}
	if w.WantFull() {
		t.Fatal("WantFull true during a complete copy")
	}
	if st := w.Status(); st.Pending != 1000+1000 {
		t.Fatalf("pending %d, want 2000 (coalesced live + building)", st.Pending)
	}
}

func TestWantFullProtocol(t *testing.T) {
	w, err := New(Options{Addrs: []string{"127.0.0.1:1"}, Mode: online.Implicit, FlushInterval: time.Hour})
	if err != nil {
		t.Fatal(err)
	}
	defer closeQuick(w)
	if !w.WantFull() {
		t.Fatal("a new writer without Adopt must want a complete copy")
	}
	rs := new(online.RowSet)
	rs.Reset(2)
	w.OfferFull(rs)
	if w.WantFull() {
		t.Fatal("WantFull stays true after the copy began")
	}
	w.RequestFull() // ignored during a copy
	if w.WantFull() {
		t.Fatal("RequestFull during a copy turned WantFull on")
	}
	w.EndFull(&online.Meta{})
	w2, _ := New(Options{Addrs: []string{"127.0.0.1:1"}, Mode: online.Implicit, Adopt: 7, FlushInterval: time.Hour})
	defer closeQuick(w2)
	if w2.WantFull() {
		t.Fatal("an adopting writer wants a complete copy before it has checked Redis")
	}
	w2.RequestFull()
	if !w2.WantFull() {
		t.Fatal("RequestFull ignored")
	}
}

func TestOptionsErrors(t *testing.T) {
	cases := []struct {
		o    Options
		want string
	}{
		{Options{Mode: online.Explicit}, "addrs"},
		{Options{Addrs: []string{"x:1"}}, "mode"},
		{Options{Addrs: []string{"x:1"}, Mode: online.Explicit, Prefix: "a{b}"}, "prefix"},
		{Options{Addrs: []string{"x:1"}, Mode: online.Explicit, Buckets: -1}, "buckets"},
		{Options{Addrs: []string{"x:1"}, Mode: online.Explicit, Grace: -time.Second}, "durations"},
	}
	for _, c := range cases {
		w, err := New(c.o)
		if err == nil {
			closeQuick(w)
			t.Fatalf("%+v accepted", c.o)
		}
		if !strings.Contains(err.Error(), c.want) {
			t.Fatalf("error %q does not name %q", err, c.want)
		}
	}
}

// closeQuick closes a writer whose Redis is unreachable without waiting long.
func closeQuick(w *Writer) {
	ctx, cancel := context.WithTimeout(context.Background(), 100*time.Millisecond)
	defer cancel()
	_ = w.Close(ctx)
}

// BenchmarkOffer measures the trainer-side hand-off: coalescing 1,000 rows of
// rank 64 into the pending table (no Redis involved).
func BenchmarkOffer(b *testing.B) {
	w, err := New(Options{Addrs: []string{"127.0.0.1:1"}, Mode: online.Explicit, FlushInterval: time.Hour})
	if err != nil {
		b.Fatal(err)
	}
	defer closeQuick(w)
	rs := new(online.RowSet)
	rs.Reset(64)
	vec := make([]float32, 64)
	for r := range int32(1000) {
		rs.Append(online.RowRecord{Side: online.Side(r & 1), Row: r, ID: []byte("listener-" + string(rune('a'+r%26))), Vec: vec})
	}
	meta := &online.Meta{Rank: 64, Mode: "explicit"}
	w.Offer(rs, meta)
	b.ReportAllocs()
	b.ResetTimer()
	for range b.N {
		w.Offer(rs, meta)
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*1000), "ns/row")
}
