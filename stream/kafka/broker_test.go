package kafka

import (
	"context"
	"fmt"
	"regexp"
	"sync/atomic"
	"testing"
	"time"

	kgo "github.com/segmentio/kafka-go"
	"go.uber.org/zap"
	"go.uber.org/zap/zaptest"

	"freshet.dev/freshet/internal/testserver"
	"freshet.dev/freshet/stream"
)

// The integration tests run against the real broker that deploy/kafka.sh
// starts; `export $(deploy/kafka.sh env)` sets these variables. They skip only
// when the variable is unset and fail when it is set but the broker does not
// answer.
const (
	envBroker   = "FRESHET_TEST_KAFKA"
	envSASL     = "FRESHET_TEST_KAFKA_SASL"
	envSASLUser = "FRESHET_TEST_KAFKA_SASL_USER"
	envSASLPass = "FRESHET_TEST_KAFKA_SASL_PASSWORD"
)

func brokerFrom(tb testing.TB, env string) string { return testserver.Kafka(tb, env) }

var nameSeq atomic.Int64

// names returns a topic, dead-letter topic and group unique to this test run.
func names(tb testing.TB) (topic, dl, group string) {
	base := regexp.MustCompile(`[^A-Za-z0-9]+`).ReplaceAllString(tb.Name(), "-")
	base = fmt.Sprintf("%s-%d-%d", base, time.Now().UnixNano()%1e9, nameSeq.Add(1))
	return "ev-" + base, "dl-" + base, "g-" + base
}

func testOptions(tb testing.TB, broker string, partitions int) Options {
	topic, dl, group := names(tb)
	var log *zap.Logger
	if t, ok := tb.(*testing.T); ok && testing.Verbose() {
		log = zaptest.NewLogger(t, zaptest.Level(zap.InfoLevel))
	}
	return Options{
		Brokers:         []string{broker},
		Topic:           topic,
		GroupID:         group,
		DeadLetterTopic: dl,
		MaxWait:         300 * time.Millisecond,
		SessionTimeout:  2 * time.Second,
		Partitions:      partitions,
		NewDecoder:      jsonDecoder,
		Logger:          log,
	}
}

// produce writes test records [0, n) to the events topic.
func produce(tb testing.TB, o Options, n int) {
	tb.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	st, err := Produce(ctx, ProduceOptions{Brokers: o.Brokers, Topic: o.Topic, Security: o.Security, Chunk: 2000}, testRecords(n))
	if err != nil {
		tb.Fatal(err)
	}
	if st.Records != int64(n) {
		tb.Fatalf("produced %d records, want %d", st.Records, n)
	}
}

// endOffsets returns each partition's end offset.
func endOffsets(tb testing.TB, o Options) map[int]int64 {
	tb.Helper()
	tr := o.Security.transport()
	defer tr.CloseIdleConnections()
	c := &kgo.Client{Addr: kgo.TCP(o.Brokers...), Transport: tr, Timeout: 10 * time.Second}
	md, err := c.Metadata(context.Background(), &kgo.MetadataRequest{Topics: []string{o.Topic}})
	if err != nil {
		tb.Fatal(err)
	}
	req := map[string][]kgo.OffsetRequest{}
	for _, p := range md.Topics[0].Partitions {
		req[o.Topic] = append(req[o.Topic], kgo.LastOffsetOf(p.ID))
	}
	resp, err := c.ListOffsets(context.Background(), &kgo.ListOffsetsRequest{Topics: req})
	if err != nil {
		tb.Fatal(err)
	}
	out := map[int]int64{}
	for _, po := range resp.Topics[o.Topic] {
		if po.Error != nil {
			tb.Fatal(po.Error)
		}
		out[po.Partition] = po.LastOffset
	}
	return out
}

// committedOffsets returns the group's committed offset per partition (-1:
// none).
func committedOffsets(tb testing.TB, o Options, partitions int) map[int]int64 {
	tb.Helper()
	tr := o.Security.transport()
	defer tr.CloseIdleConnections()
	c := &kgo.Client{Addr: kgo.TCP(o.Brokers...), Transport: tr, Timeout: 10 * time.Second}
	ps := make([]int, partitions)
	for i := range ps {
		ps[i] = i
	}
	resp, err := c.OffsetFetch(context.Background(), &kgo.OffsetFetchRequest{GroupID: o.GroupID, Topics: map[string][]int{o.Topic: ps}})
	if err != nil {
		tb.Fatal(err)
	}
	out := map[int]int64{}
	for _, p := range resp.Topics[o.Topic] {
		out[p.Partition] = p.CommittedOffset
	}
	return out
}

// seen records, per partition and offset, how often the trainer was handed a
// record.
type seen map[int32]map[int64]int

func (s seen) add(p int32, off int64) {
	m := s[p]
	if m == nil {
		m = map[int64]int{}
		s[p] = m
	}
	m[off]++
}

// applier stands in for the trainer: it takes batches, checks each event
// against what was produced, and commits after every batch.
type applier struct {
	tb       testing.TB
	src      *Source
	events   int
	rejected int
	seen     seen
	last     stream.Position
	commit   bool
}

func newApplier(tb testing.TB, src *Source) *applier {
	return &applier{tb: tb, src: src, seen: seen{}, commit: true}
}

// run applies batches until records (events + rejects) ≥ until, or timeout.
func (a *applier) run(until int, timeout time.Duration) {
	a.tb.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), timeout)
	defer cancel()
	for a.events+a.rejected < until {
		b, err := a.src.Next(ctx)
		if err != nil {
			a.tb.Fatalf("Next after %d events and %d rejects (want %d): %v", a.events, a.rejected, until, err)
		}
		for i := range b.Events {
			ev := &b.Events[i]
			a.seen.add(ev.Partition, ev.Offset)
			if len(ev.User) == 0 || len(ev.Item) == 0 || ev.Time < 1700000000000 {
				a.tb.Fatalf("event at %d/%d is not what was produced: %+v", ev.Partition, ev.Offset, ev)
			}
		}
		a.events += b.Len()
		a.rejected += b.Rejected
		a.last = b.Pos.Clone()
		if a.commit {
			if err := a.src.Commit(ctx, b.Pos); err != nil {
				a.tb.Fatal(err)
			}
		}
	}
}

// step applies one batch (possibly empty) and commits.
func (a *applier) step() {
	a.tb.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	b, err := a.src.Next(ctx)
	if err != nil {
		a.tb.Fatal(err)
	}
	for i := range b.Events {
		a.seen.add(b.Events[i].Partition, b.Events[i].Offset)
	}
	a.events += b.Len()
	a.rejected += b.Rejected
	a.last = b.Pos.Clone()
	if err := a.src.Commit(ctx, b.Pos); err != nil {
		a.tb.Fatal(err)
	}
}

// settle commits the latest position until the group's offsets reach the end
// offsets (dead-letter acknowledgements can hold them back briefly).
func (a *applier) settle(o Options, want map[int]int64) {
	a.tb.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for {
		if err := a.src.Commit(context.Background(), a.last); err != nil {
			a.tb.Fatal(err)
		}
		got := committedOffsets(a.tb, o, len(want))
		ok := true
		for p, end := range want {
			ok = ok && got[p] == end
		}
		if ok {
			return
		}
		if time.Now().After(deadline) {
			a.tb.Fatalf("committed offsets %v, want the end offsets %v", got, want)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// deadLetters reads the whole dead-letter topic.
func deadLetters(tb testing.TB, o Options, want int) []kgo.Message {
	tb.Helper()
	var out []kgo.Message
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	// The writes are asynchronous: wait until the topic holds want records.
	var ends map[int]int64
	for deadline := time.Now().Add(20 * time.Second); ; {
		ends = endOffsets(tb, Options{Brokers: o.Brokers, Topic: o.DeadLetterTopic, Security: o.Security})
		total := int64(0)
		for _, e := range ends {
			total += e
		}
		if total >= int64(want) || time.Now().After(deadline) {
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	for p, end := range ends {
		if end == 0 {
			continue
		}
		r := kgo.NewReader(kgo.ReaderConfig{Brokers: o.Brokers, Topic: o.DeadLetterTopic, Partition: p, MaxWait: 300 * time.Millisecond, Dialer: o.dialer()})
		for {
			m, err := r.ReadMessage(ctx)
			if err != nil {
				r.Close()
				tb.Fatalf("reading dead letters of partition %d: %v", p, err)
			}
			out = append(out, m)
			if m.Offset+1 >= end {
				break
			}
		}
		r.Close()
	}
	if len(out) < want {
		tb.Fatalf("%d dead letters, want %d", len(out), want)
	}
	return out
}

func header(m kgo.Message, key string) (string, bool) {
	for _, h := range m.Headers {
		if h.Key == key {
			return string(h.Value), true
		}
	}
	return "", false
}

func mustEnsure(tb testing.TB, o Options) {
	tb.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if err := EnsureTopics(ctx, o); err != nil {
		tb.Fatal(err)
	}
}

func mustNew(tb testing.TB, o Options, from stream.Position) *Source {
	tb.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	s, err := New(ctx, o, from)
	if err != nil {
		tb.Fatal(err)
	}
	return s
}
