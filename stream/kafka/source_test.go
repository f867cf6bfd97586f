package kafka

import (
	"context"
	"errors"
	"fmt"
	"os"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	kgo "github.com/segmentio/kafka-go"

	"freshet.dev/freshet/stream"
)

// TestConsumeAll: 100,000 records, 1% malformed, three partitions. Every good
// record is applied once, every bad one is dead-lettered with its reason, and
// the committed offsets reach the end offsets.
func TestConsumeAll(t *testing.T) {
	broker := brokerFrom(t, envBroker)
	const n, parts = 100_000, 3
	o := testOptions(t, broker, parts)
	mustEnsure(t, o)
	produce(t, o, n)
	ends := endOffsets(t, o)

	src := mustNew(t, o, stream.Position{})
	defer src.Close()
	a := newApplier(t, src)
	a.run(n, 2*time.Minute)

	wantBad := 0
	for i := range n {
		if bad(i) {
			wantBad++
		}
	}
	if a.events+a.rejected != n || a.rejected != wantBad {
		t.Fatalf("applied %d + rejected %d, want %d + %d", a.events, a.rejected, n-wantBad, wantBad)
	}
	for p, m := range a.seen {
		for off, c := range m {
			if c != 1 {
				t.Fatalf("partition %d offset %d applied %d times", p, off, c)
			}
		}
	}
	a.settle(o, ends)
	if lag := src.Lag(); len(lag) != parts {
		t.Errorf("lag for %d partitions, want %d", len(lag), parts)
	} else {
		for _, l := range lag {
			if l.Lag != 0 || l.Next != ends[int(l.Partition)] {
				t.Errorf("partition %d: lag %+v at the end", l.Partition, l)
			}
		}
	}
	st := src.Stats()
	if st.Events != int64(n-wantBad) || st.Rejected != int64(wantBad) || st.DeadLettered < int64(wantBad) {
		t.Errorf("stats %+v", st)
	}

	// Every dead letter carries its reason and source location; together they
	// are exactly the malformed records.
	dls := deadLetters(t, o, wantBad)
	got := map[string]bool{}
	for _, m := range dls {
		field, ok1 := header(m, HeaderField)
		reason, ok2 := header(m, HeaderError)
		part, ok3 := header(m, HeaderSourcePartition)
		off, ok4 := header(m, HeaderSourceOffset)
		topic, _ := header(m, HeaderSourceTopic)
		if !ok1 || !ok2 || !ok3 || !ok4 || reason == "" || topic != o.Topic {
			t.Fatalf("dead letter without its reason headers: %v", m.Headers)
		}
		if !strings.Contains(reason, "partition "+part+" offset "+off) {
			t.Errorf("reason %q does not locate the record", reason)
		}
		missingUser := strings.Contains(string(m.Value), `"user":""`)
		if missingUser != (field == "user") {
			t.Errorf("record %q: field header %q", m.Value, field)
		}
		if string(m.Key) != part {
			t.Errorf("dead letter key %q, want the source partition %q", m.Key, part)
		}
		got[part+"/"+off] = true
	}
	if len(got) != wantBad {
		t.Errorf("%d distinct dead-lettered records, want %d", len(got), wantBad)
	}
}

// TestResume: a source reopened at a position (or at the committed offset)
// neither skips nor repeats a record.
func TestResume(t *testing.T) {
	broker := brokerFrom(t, envBroker)
	const n, parts = 20_000, 2
	for _, viaCommit := range []bool{false, true} {
		name := "position"
		if viaCommit {
			name = "committed"
		}
		t.Run(name, func(t *testing.T) {
			o := testOptions(t, broker, parts)
			mustEnsure(t, o)
			produce(t, o, n)

			first := mustNew(t, o, stream.Position{})
			a := newApplier(t, first)
			a.commit = viaCommit
			a.run(n/3, time.Minute)
			if viaCommit {
				// Let the dead-letter acknowledgements through, then commit.
				deadline := time.Now().Add(10 * time.Second)
				for first.dl.Waiting() > 0 && time.Now().Before(deadline) {
					time.Sleep(20 * time.Millisecond)
				}
				if err := first.Commit(context.Background(), a.last); err != nil {
					t.Fatal(err)
				}
			}
			pos := a.last
			if err := first.Close(); err != nil {
				t.Fatal(err)
			}

			from := pos
			if viaCommit {
				from = stream.Position{} // a new model would not; here the commit must carry it
			}
			second := mustNew(t, o, from)
			defer second.Close()
			b := newApplier(t, second)
			b.run(n-(a.events+a.rejected), time.Minute)

			all := seen{}
			for _, s := range []seen{a.seen, b.seen} {
				for p, m := range s {
					for off, c := range m {
						for range c {
							all.add(p, off)
						}
					}
				}
			}
			ends := endOffsets(t, o)
			total := 0
			for p, m := range all {
				for off, c := range m {
					if c != 1 {
						t.Fatalf("partition %d offset %d applied %d times", p, off, c)
					}
				}
				total += len(m)
				_ = ends[int(p)]
			}
			if total+a.rejected+b.rejected != n {
				t.Fatalf("applied %d + rejected %d, want %d records", total, a.rejected+b.rejected, n)
			}
			if b.last.String() != "kafka "+o.Topic+" 0:"+strconv.FormatInt(ends[0], 10)+" 1:"+strconv.FormatInt(ends[1], 10) {
				t.Errorf("final position %s, end offsets %v", b.last, ends)
			}
		})
	}
}

// TestRebalance: two sources in one group. Both get partitions; when one
// leaves, its partitions move and nothing is lost; commits through the old
// generation cannot move the new owner's offsets back.
func TestRebalance(t *testing.T) {
	broker := brokerFrom(t, envBroker)
	const n, parts = 40_000, 4
	o := testOptions(t, broker, parts)
	o.Shared = true
	mustEnsure(t, o)
	produce(t, o, n/2) // the second half once both sources hold partitions

	srcA := mustNew(t, o, stream.Position{})
	defer srcA.Close()
	a := newApplier(t, srcA)
	a.run(2000, time.Minute)
	genA, partsA := srcA.Assignment()
	if len(partsA) != parts {
		t.Fatalf("alone, source A holds %v", partsA)
	}
	srcA.mu.Lock()
	oldGen := srcA.gen
	srcA.mu.Unlock()

	// B joins: the group rebalances and both hold partitions. A keeps
	// applying (its Next drives nothing of the group, but its workers must
	// not block the generation from ending).
	srcB := mustNew(t, o, stream.Position{})
	defer srcB.Close()
	b := newApplier(t, srcB)
	var wg sync.WaitGroup
	stop := make(chan struct{})
	wg.Add(1)
	go func() {
		defer wg.Done()
		ctx := context.Background()
		for {
			select {
			case <-stop:
				return
			default:
			}
			bt, err := srcA.Next(ctx)
			if err != nil {
				t.Error(err)
				return
			}
			for i := range bt.Events {
				a.seen.add(bt.Events[i].Partition, bt.Events[i].Offset)
			}
			a.events += bt.Len()
			a.rejected += bt.Rejected
			a.last = bt.Pos.Clone()
			if err := srcA.Commit(ctx, bt.Pos); err != nil {
				t.Error(err)
			}
		}
	}()
	// Wait for the rebalance, then produce the second half, so B surely has
	// records to read however far A got.
	for deadline := time.Now().Add(30 * time.Second); ; {
		_, pa := srcA.Assignment()
		_, pb := srcB.Assignment()
		if len(pb) > 0 && len(pa)+len(pb) == parts {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("no rebalance: A holds %v, B holds %v", pa, pb)
		}
		time.Sleep(50 * time.Millisecond)
	}
	produce(t, o, n/2)
	ends := endOffsets(t, o)
	b.run(3000, time.Minute)
	_, partsB := srcB.Assignment()
	close(stop)
	wg.Wait()
	genA2, partsA2 := srcA.Assignment()
	if len(partsB) == 0 || len(partsA2) == 0 || len(partsA2)+len(partsB) != parts || genA2 == genA {
		t.Fatalf("after B joined: A holds %v (generation %d, was %d), B holds %v", partsA2, genA2, genA, partsB)
	}

	// A commit through A's first generation must fail and leave the group's
	// offsets alone.
	before := committedOffsets(t, o, parts)
	if err := oldGen.CommitOffsets(map[string]map[int]int64{o.Topic: {int(partsB[0]): 0}}); err == nil {
		t.Error("a commit through an ended generation succeeded")
	}
	if after := committedOffsets(t, o, parts); after[int(partsB[0])] < before[int(partsB[0])] {
		t.Fatalf("old generation moved partition %d back: %d -> %d", partsB[0], before[int(partsB[0])], after[int(partsB[0])])
	}

	// B leaves after one more stretch; its partitions move to A.
	b.run(b.events+b.rejected+2000, time.Minute)
	if err := srcB.Close(); err != nil {
		t.Fatal(err)
	}
	deadline := time.Now().Add(time.Minute)
	for {
		_, held := srcA.Assignment()
		pos := srcA.Position()
		done := len(held) == parts
		for p, end := range ends {
			next, _ := lookupNext(pos.Partitions, int32(p))
			done = done && next == end
		}
		if done {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("A did not reach the end offsets %v: holds %v at %s; lag %+v; stats %+v", ends, held, pos, srcA.Lag(), srcA.Stats())
		}
		a.step()
	}

	// A late commit from B, for a position it read before it left (ahead of
	// what it committed, behind the new owner), goes through B's ended
	// generation: it must fail quietly and move nothing back.
	a.settle(o, ends)
	srcB.mu.Lock()
	var late stream.Position
	late.Source, late.Topic = "kafka", o.Topic
	for _, p := range partsB {
		late.Partitions = setNext(late.Partitions, p, srcB.committed[p]+1)
	}
	srcB.mu.Unlock()
	errsBefore := srcB.Stats().CommitErrors
	if err := srcB.Commit(context.Background(), late); err != nil {
		t.Fatal(err)
	}
	if got := srcB.Stats().CommitErrors; got != errsBefore+1 {
		t.Errorf("late commit: commit errors %d -> %d, want one more", errsBefore, got)
	}
	if got := committedOffsets(t, o, parts); !equalOffsets(got, ends) {
		t.Fatalf("after a late commit from the old owner the group holds %v, want %v", got, ends)
	}

	// Nothing lost: the distinct records applied by A or B, plus the
	// distinct dead letters, are every record produced.
	distinct := 0
	dups := 0
	for p := range int32(parts) {
		for off, c := range a.seen[p] {
			c += b.seen[p][off]
			distinct++
			dups += c - 1
		}
		for off := range b.seen[p] {
			if a.seen[p][off] == 0 {
				distinct++
				dups += b.seen[p][off] - 1
			}
		}
	}
	dlSet := map[string]bool{}
	for _, m := range deadLetters(t, o, 0) {
		part, _ := header(m, HeaderSourcePartition)
		off, _ := header(m, HeaderSourceOffset)
		dlSet[part+"/"+off] = true
	}
	if distinct+len(dlSet) != n {
		t.Fatalf("%d distinct applied + %d distinct dead letters, want %d", distinct, len(dlSet), n)
	}
	t.Logf("A applied %d, B applied %d; %d events re-applied after the rebalances (at least once)", a.events, b.events, dups)
}

func equalOffsets(a, b map[int]int64) bool {
	if len(a) != len(b) {
		return false
	}
	for k, v := range a {
		if b[k] != v {
			return false
		}
	}
	return true
}

// TestLease: a second source for the same group is refused with a clear error
// unless sharing is asked for.
func TestLease(t *testing.T) {
	broker := brokerFrom(t, envBroker)
	o := testOptions(t, broker, 1)
	mustEnsure(t, o)
	produce(t, o, 100)
	first := mustNew(t, o, stream.Position{})
	defer first.Close()
	a := newApplier(t, first)
	a.run(100, 30*time.Second) // joined and consuming

	start := time.Now()
	second, err := New(context.Background(), o, stream.Position{})
	if err == nil {
		second.Close()
		t.Fatal("a second source for the same group started")
	}
	if !strings.Contains(err.Error(), "active member") || !strings.Contains(err.Error(), o.GroupID) {
		t.Errorf("unclear refusal: %v", err)
	}
	t.Logf("refused after %v: %v", time.Since(start).Round(time.Millisecond), err)

	// Once the first leaves, the group is free again.
	if err := first.Close(); err != nil {
		t.Fatal(err)
	}
	third := mustNew(t, o, stream.Position{})
	third.Close()
}

// TestSASL: SCRAM (both hashes) and PLAIN on the broker's SASL listener;
// wrong credentials fail fast with a clear error.
func TestSASL(t *testing.T) {
	addr := brokerFrom(t, envSASL)
	user, pass := os.Getenv(envSASLUser), os.Getenv(envSASLPass)
	if user == "" {
		t.Fatalf("%s is set but %s is not", envSASL, envSASLUser)
	}
	for _, mech := range []string{"SCRAM-SHA-512", "SCRAM-SHA-256", "PLAIN"} {
		t.Run(mech, func(t *testing.T) {
			m, err := SASL(mech, user, pass)
			if err != nil {
				t.Fatal(err)
			}
			o := testOptions(t, addr, 1)
			o.Security.SASL = m
			mustEnsure(t, o)
			produce(t, o, 1000)
			src := mustNew(t, o, stream.Position{})
			defer src.Close()
			a := newApplier(t, src)
			a.run(1000, 30*time.Second)
			a.settle(o, endOffsets(t, o))

			bad, _ := SASL(mech, user, pass+"-wrong")
			o.Security.SASL = bad
			start := time.Now()
			ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
			defer cancel()
			_, err = New(ctx, o, stream.Position{})
			took := time.Since(start)
			if err == nil {
				t.Fatal("wrong credentials accepted")
			}
			if !errors.Is(err, kgo.SASLAuthenticationFailed) || !strings.Contains(err.Error(), "SASL") {
				t.Errorf("unclear error for wrong credentials: %v", err)
			}
			// Fails on the first request, not after a retry loop: the bound
			// is generous for a loaded machine (common practice for "fast").
			if took > 10*time.Second {
				t.Errorf("wrong credentials took %v to fail", took)
			}
			t.Logf("wrong credentials: %v after %v", err, took.Round(time.Millisecond))
		})
	}
}

// TestLargeRecord: a record larger than the worker's read buffer is read
// whole (the buffer grows), set aside by the decoder, and reading goes on.
func TestLargeRecord(t *testing.T) {
	broker := brokerFrom(t, envBroker)
	o := testOptions(t, broker, 1)
	mustEnsure(t, o)
	big := `{"user":"` + strings.Repeat("x", 300<<10) + `","item":"show-1","value":1,"time":1700000000000}`
	recs := func(yield func(Record) bool) {
		for i := range 30 {
			v := fmt.Sprintf(`{"user":"listener-%d","item":"show-%d","value":2,"time":%d}`, i, i, 1700000000000+int64(i))
			if i == 10 {
				v = big
			}
			if !yield(Record{Key: []byte("k"), Value: []byte(v)}) {
				return
			}
		}
	}
	if _, err := Produce(context.Background(), ProduceOptions{Brokers: o.Brokers, Topic: o.Topic}, recs); err != nil {
		t.Fatal(err)
	}
	src := mustNew(t, o, stream.Position{})
	defer src.Close()
	a := newApplier(t, src)
	a.run(30, 30*time.Second)
	if a.events != 29 || a.rejected != 1 {
		t.Fatalf("applied %d, rejected %d; want 29 and 1", a.events, a.rejected)
	}
	dls := deadLetters(t, o, 1)
	if len(dls[0].Value) != len(big) {
		t.Errorf("dead letter holds %d bytes, want the original %d", len(dls[0].Value), len(big))
	}
	if f, _ := header(dls[0], HeaderField); f != "user" {
		t.Errorf("dead letter field %q, want user (longer than stream.MaxIDLen)", f)
	}
}

// TestProduceBounds: the token bucket holds the rate, and Max and
// MaxDuration stop the producer.
func TestProduceBounds(t *testing.T) {
	broker := brokerFrom(t, envBroker)
	o := testOptions(t, broker, 2)
	mustEnsure(t, o)
	ctx := context.Background()

	// 1,000 records at 4,000/s with chunks of 100 (the bucket's depth): the
	// first chunk goes at once, the other 900 records need at least 0.225 s.
	st, err := Produce(ctx, ProduceOptions{Brokers: o.Brokers, Topic: o.Topic, Rate: 4000, Chunk: 100, Max: 1000}, testRecords(5000))
	if err != nil {
		t.Fatal(err)
	}
	if st.Records != 1000 {
		t.Fatalf("wrote %d records, want Max = 1000", st.Records)
	}
	if st.Elapsed < 225*time.Millisecond {
		t.Errorf("1000 records at 4000/s took %v, want at least 225ms", st.Elapsed)
	}

	// MaxDuration ends an unbounded stream without an error.
	endless := func(yield func(Record) bool) {
		for i := 0; ; i++ {
			if !yield(Record{Key: []byte("k"), Value: []byte(`{"user":"a","item":"b","value":1}`)}) {
				return
			}
		}
	}
	st, err = Produce(ctx, ProduceOptions{Brokers: o.Brokers, Topic: o.Topic, Rate: 2000, Chunk: 50, MaxDuration: 300 * time.Millisecond}, endless)
	if err != nil {
		t.Fatal(err)
	}
	if st.Records == 0 || st.Records > 2000*3/10+50 {
		t.Errorf("300ms at 2000/s wrote %d records, want 1..650", st.Records)
	}
	ends := endOffsets(t, o)
	if ends[0]+ends[1] != 1000+st.Records {
		t.Errorf("topic holds %d records, want %d", ends[0]+ends[1], 1000+st.Records)
	}
}

// TestPositionBeyondEnd: a checkpoint position past a partition's end (the
// topic was recreated, say) stops the source with an error naming the
// partition and both offsets, rather than silently reading from elsewhere.
func TestPositionBeyondEnd(t *testing.T) {
	broker := brokerFrom(t, envBroker)
	o := testOptions(t, broker, 1)
	mustEnsure(t, o)
	produce(t, o, 50)
	from := stream.Position{Source: "kafka", Topic: o.Topic, Partitions: []stream.PartitionOffset{{Partition: 0, Next: 5000}}}
	src := mustNew(t, o, from)
	defer src.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	for {
		b, err := src.Next(ctx)
		if err != nil {
			if !errors.Is(err, errBeyondEnd) || !strings.Contains(err.Error(), "partition 0: next offset 5000 is beyond the end offset 50") {
				t.Fatalf("unclear error: %v", err)
			}
			return
		}
		if b.Len() > 0 {
			t.Fatalf("read %d events from a position past the end", b.Len())
		}
	}
}
