package kafka

import (
	"context"
	"crypto/tls"
	"strings"
	"testing"
	"time"

	"freshet.dev/freshet/stream"
)

func TestPlanCommit(t *testing.T) {
	owned := map[int32]*partState{0: {}, 1: {}, 3: {}}
	held := map[int32]int64{1: 40}
	heldFn := func(p int32) (int64, bool) { v, ok := held[p]; return v, ok }
	committed := map[int32]int64{0: 100, 3: 7}
	pos := []stream.PartitionOffset{{Partition: 0, Next: 120}, {Partition: 1, Next: 55}, {Partition: 2, Next: 9}, {Partition: 3, Next: 7}}

	got := planCommit(pos, owned, committed, heldFn)
	// 0: moves on; 1: capped at its unacknowledged dead letter at 40;
	// 2: not owned by this generation; 3: would not move.
	want := map[int]int64{0: 120, 1: 40}
	if len(got) != len(want) {
		t.Fatalf("plan = %v, want %v", got, want)
	}
	for p, v := range want {
		if got[p] != v {
			t.Errorf("partition %d: plan %d, want %d", p, got[p], v)
		}
	}

	// Never backwards: a position behind the committed offset commits nothing.
	if got := planCommit([]stream.PartitionOffset{{Partition: 0, Next: 90}}, owned, committed, heldFn); len(got) != 0 {
		t.Errorf("backward plan = %v, want none", got)
	}
	// A held offset below the committed value blocks the partition entirely.
	held[0] = 50
	if got := planCommit([]stream.PartitionOffset{{Partition: 0, Next: 130}}, owned, committed, heldFn); len(got) != 0 {
		t.Errorf("plan with an old held offset = %v, want none", got)
	}
}

func TestPendingCapsUntilAck(t *testing.T) {
	p := newPending()
	if _, ok := p.lowest(2); ok {
		t.Fatal("empty tracker holds an offset")
	}
	p.add(2, 10)
	p.add(2, 15)
	p.add(2, 10) // the same record dead-lettered again after a re-read
	p.add(5, 3)
	check := func(part int32, want int64, wantOK bool) {
		t.Helper()
		got, ok := p.lowest(part)
		if ok != wantOK || (ok && got != want) {
			t.Fatalf("lowest(%d) = %d, %v; want %d, %v", part, got, ok, want, wantOK)
		}
	}
	check(2, 10, true)
	p.ack(2, 10)
	check(2, 10, true) // the second entry for 10 is still waiting
	p.ack(2, 10)
	check(2, 15, true)
	p.ack(2, 15)
	check(2, 0, false)
	check(5, 3, true)
	if n := p.count(); n != 1 {
		t.Errorf("count = %d, want 1", n)
	}
	p.ack(5, 99) // unknown: ignored
	check(5, 3, true)
}

func TestSetNextKeepsSorted(t *testing.T) {
	var ps []stream.PartitionOffset
	for _, u := range []struct {
		p    int32
		next int64
	}{{3, 30}, {0, 5}, {7, 70}, {3, 31}, {1, 10}, {0, 6}} {
		ps = setNext(ps, u.p, u.next)
	}
	want := []stream.PartitionOffset{{Partition: 0, Next: 6}, {Partition: 1, Next: 10}, {Partition: 3, Next: 31}, {Partition: 7, Next: 70}}
	if len(ps) != len(want) {
		t.Fatalf("got %v, want %v", ps, want)
	}
	for i := range want {
		if ps[i] != want[i] {
			t.Fatalf("got %v, want %v", ps, want)
		}
	}
	if v, ok := lookupNext(ps, 3); !ok || v != 31 {
		t.Errorf("lookupNext(3) = %d, %v", v, ok)
	}
	if _, ok := lookupNext(ps, 2); ok {
		t.Error("lookupNext(2) found a partition never set")
	}
	if a := testing.AllocsPerRun(100, func() { ps = setNext(ps, 3, 99) }); a != 0 {
		t.Errorf("setNext on a known partition allocates %.1f times", a)
	}
}

func TestChooseStart(t *testing.T) {
	for _, c := range []struct {
		name      string
		delivered int64
		has, cont bool
		committed int64
		want      int64
		wantKind  startKind
	}{
		{"checkpoint wins over commit", 500, true, true, 800, 500, startDelivered},
		{"checkpoint ahead of commit", 900, true, true, 800, 900, startDelivered},
		{"regained, others read on", 500, true, false, 800, 800, startCommitted},
		{"regained, nobody read on", 900, true, false, 800, 900, startDelivered},
		{"no position, committed", 0, false, false, 42, 42, startCommitted},
		{"regained, no commit", 17, true, false, -1, 17, startDelivered},
		{"brand new", 0, false, false, -2, -1, startConfigured},
	} {
		got, kind := chooseStart(c.delivered, c.has, c.cont, c.committed)
		if got != c.want || kind != c.wantKind {
			t.Errorf("%s: chooseStart = %d (%s), want %d (%s)", c.name, got, kind, c.want, c.wantKind)
		}
	}
}

func TestOptionsValidation(t *testing.T) {
	good := Options{Brokers: []string{"127.0.0.1:1"}, Topic: "ev", GroupID: "g", DeadLetterTopic: "ev-dl", NewDecoder: jsonDecoder}
	o, err := good.withDefaults()
	if err != nil {
		t.Fatal(err)
	}
	if o.BatchSize != DefaultBatchSize || o.MaxWait != DefaultMaxWait || o.SessionTimeout != DefaultSessionTimeout {
		t.Errorf("defaults not applied: %+v", o)
	}
	for _, c := range []struct {
		field string
		edit  func(*Options)
	}{
		{"brokers", func(o *Options) { o.Brokers = nil }},
		{"brokers[0]", func(o *Options) { o.Brokers = []string{"nohost"} }},
		{"topic", func(o *Options) { o.Topic = "" }},
		{"group id", func(o *Options) { o.GroupID = "" }},
		{"dead-letter topic", func(o *Options) { o.DeadLetterTopic = "" }},
		{"dead-letter topic", func(o *Options) { o.DeadLetterTopic = "ev" }},
		{"decoder", func(o *Options) { o.Decoder, o.NewDecoder = nil, nil }},
		{"max wait", func(o *Options) { o.MaxWait = 100 * time.Millisecond }},
		{"max wait", func(o *Options) { o.MaxWait = 2 * time.Second }},
		{"session timeout", func(o *Options) { o.SessionTimeout = 500 * time.Millisecond }},
		{"batch size", func(o *Options) { o.BatchSize = -1 }},
		{"min bytes", func(o *Options) { o.MinBytes, o.MaxBytes = 10, 5 }},
		{"start", func(o *Options) { o.Start = 9 }},
	} {
		o := good
		c.edit(&o)
		_, err := o.withDefaults()
		if err == nil || !strings.Contains(err.Error(), c.field+":") {
			t.Errorf("%s: error %v does not name the field", c.field, err)
		}
	}
}

func TestSASLMechanisms(t *testing.T) {
	for _, name := range []string{"PLAIN", "scram-sha-256", "SCRAM-SHA-512"} {
		m, err := SASL(name, "listener", "pw")
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		if !strings.EqualFold(m.Name(), name) {
			t.Errorf("%s: mechanism name %q", name, m.Name())
		}
	}
	if _, err := SASL("GSSAPI", "u", "p"); err == nil || !strings.Contains(err.Error(), "GSSAPI") {
		t.Errorf("unknown mechanism: %v", err)
	}
	if _, err := SASL("PLAIN", "", "p"); err == nil {
		t.Error("empty user accepted")
	}
}

// TestNewRejectsForeignPosition checks the position guard, which runs before
// any connection is made.
func TestNewRejectsForeignPosition(t *testing.T) {
	o := Options{Brokers: []string{"127.0.0.1:1"}, Topic: "ev", GroupID: "g", DeadLetterTopic: "ev-dl", NewDecoder: jsonDecoder}
	for _, c := range []struct {
		pos  stream.Position
		want string
	}{
		{stream.Position{Source: "file", Path: "x"}, "not kafka"},
		{stream.Position{Source: "kafka", Topic: "other"}, "topic \"other\""},
		{stream.Position{Source: "kafka", Topic: "ev", Partitions: []stream.PartitionOffset{{Partition: 0, Next: -3}}}, "partitions[0]"},
	} {
		_, err := New(context.Background(), o, c.pos)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("position %v: error %v, want it to mention %q", c.pos, err, c.want)
		}
	}
}

// TestNextHandOver drives Next with batches queued by hand (no broker): the
// position merges every partition, stale generations are dropped, an idle
// source yields an empty batch, and the hand-over does not allocate.
func TestNextHandOver(t *testing.T) {
	s := &Source{
		o:     Options{Topic: "ev", BatchSize: 4},
		ready: make(chan *item, 8),
		free:  make(chan *item, 8),
		fatal: make(chan error, 1),
		idle:  &item{},
		timer: time.NewTimer(idleEvery),
		seq:   2,
	}
	s.delivered = setNext(s.delivered, 5, 500) // from a checkpoint
	push := func(seq uint64, p int32, next int64, events int) {
		it := s.getItem(seq, p)
		for range events {
			it.b.Add(stream.Event{User: []byte("l"), Item: []byte("s"), Partition: p})
		}
		it.next = next
		s.ready <- it
	}
	ctx := context.Background()
	push(1, 0, 99, 3) // stale generation
	push(2, 1, 10, 2)
	push(2, 0, 7, 4)
	b, err := s.Next(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if b.Len() != 2 || b.Pos.String() != "kafka ev 1:10 5:500" {
		t.Fatalf("first batch: %d events at %s", b.Len(), b.Pos)
	}
	b, _ = s.Next(ctx)
	if b.Len() != 4 || b.Pos.String() != "kafka ev 0:7 1:10 5:500" {
		t.Fatalf("second batch: %d events at %s", b.Len(), b.Pos)
	}
	if st := s.Stats; st().Discarded != 1 || st().Events != 6 {
		t.Errorf("stats %+v", st())
	}
	b, _ = s.Next(ctx) // nothing queued: an empty batch within idleEvery
	if b.Len() != 0 || b.Pos.String() != "kafka ev 0:7 1:10 5:500" {
		t.Fatalf("idle batch: %d events at %s", b.Len(), b.Pos)
	}

	user, show := []byte("listener-1"), []byte("show-1")
	it := s.getItem(2, 1)
	it.b.Add(stream.Event{User: user, Item: show})
	allocs := testing.AllocsPerRun(200, func() {
		it.next++
		s.ready <- it
		if _, err := s.Next(ctx); err != nil {
			t.Fatal(err)
		}
		it = s.getItem(2, 1) // Next recycled the batch
		it.b.Add(stream.Event{User: user, Item: show})
	})
	if allocs != 0 {
		t.Errorf("Next allocates %.1f times per batch", allocs)
	}
}

// TestSecurityPlumbing: TLS and SASL reach the readers' Dialer and the
// writers' Transport. (The test broker has no TLS listener; SASL is exercised
// for real in TestSASL.)
func TestSecurityPlumbing(t *testing.T) {
	m, err := SASL("SCRAM-SHA-256", "listener", "pw")
	if err != nil {
		t.Fatal(err)
	}
	cfg := &tls.Config{ServerName: "broker.test", MinVersion: tls.VersionTLS12}
	o := Options{Security: Security{TLS: cfg, SASL: m}}
	d := o.dialer()
	if d.TLS != cfg || d.SASLMechanism != m {
		t.Errorf("dialer: TLS %p, SASL %v", d.TLS, d.SASLMechanism)
	}
	tr := o.Security.transport()
	if tr.TLS != cfg || tr.SASL != m {
		t.Errorf("transport: TLS %p, SASL %v", tr.TLS, tr.SASL)
	}
}
