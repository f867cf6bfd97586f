package main

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	kgo "github.com/segmentio/kafka-go"

	"freshet.dev/freshet/config"
	"freshet.dev/freshet/internal/testserver"
	"freshet.dev/freshet/online"
	"freshet.dev/freshet/stream"
	"freshet.dev/freshet/stream/kafka"
)

// The daemon-level Kafka tests run the daemon (the test binary re-executed,
// see TestMain) against the real broker that deploy/kafka.sh starts;
// `export $(deploy/kafka.sh env)` sets the variables below. A test skips only
// when its variable is unset and fails when it is set but the broker does not
// answer.
const (
	envTestKafka     = "FRESHET_TEST_KAFKA"
	envTestKafkaSASL = "FRESHET_TEST_KAFKA_SASL"
	envTestSASLUser  = "FRESHET_TEST_KAFKA_SASL_USER"
	envTestSASLPass  = "FRESHET_TEST_KAFKA_SASL_PASSWORD"

	// kafkaTimeout bounds one wait on the daemon: generous for -race on a
	// shared 2-core machine with the broker on the same cores.
	kafkaTimeout = 2 * time.Minute
	// kafkaFlush is the checkpoint flush interval the Kafka tests run with.
	kafkaFlush = 50 * time.Millisecond
)

// testBroker returns the broker address in the variable env, skipping the
// test when it is unset and failing it when nothing answers there.
func testBroker(tb testing.TB, env string) string { return testserver.Kafka(tb, env) }

var kafkaSeq atomic.Int64

// kafkaNames returns a topic and a group unique to this test and run.
func kafkaNames(tb testing.TB) (topic, group string) {
	base := regexp.MustCompile(`[^A-Za-z0-9]+`).ReplaceAllString(tb.Name(), "-")
	base = fmt.Sprintf("%s-%d-%d", base, time.Now().UnixNano()%1e9, kafkaSeq.Add(1))
	return "d-ev-" + base, "d-g-" + base
}

// modelEnv is the model, checkpoint and progress settings shared by the Kafka
// runs and their file replays: rank 8, explicit ratings on the default scale,
// short flush and progress periods.
func modelEnv() map[string]string {
	return map[string]string{
		"FRESHET_MODEL_RANK":                "8",
		"FRESHET_MONITOR_PROGRESS_INTERVAL": "100ms",
		"FRESHET_CHECKPOINT_FLUSH_INTERVAL": kafkaFlush.String(),
		// The demo the generated events come from (see kafkaEvents).
		"FRESHET_SOURCE_SCENARIO_LISTENERS": "3000",
		"FRESHET_SOURCE_SCENARIO_SHOWS":     "400",
		"FRESHET_SOURCE_SCENARIO_SHIFT_AT":  "0",
		"FRESHET_SOURCE_SCENARIO_SEED":      "11",
	}
}

// kafkaEnv is modelEnv with the Kafka source on topic and group, a 2 s
// session timeout (the test broker's minimum is 1 s) and topic creation on.
func kafkaEnv(broker, topic, group string, partitions int) map[string]string {
	env := modelEnv()
	for k, v := range map[string]string{
		"FRESHET_SOURCE_KIND":           "kafka",
		"FRESHET_KAFKA_BROKERS":         broker,
		"FRESHET_KAFKA_TOPIC":           topic,
		"FRESHET_KAFKA_GROUP":           group,
		"FRESHET_KAFKA_CREATE_TOPICS":   "true",
		"FRESHET_KAFKA_PARTITIONS":      strconv.Itoa(partitions),
		"FRESHET_KAFKA_SESSION_TIMEOUT": "2s",
		"FRESHET_KAFKA_MAX_WAIT":        "300ms",
	} {
		env[k] = v
	}
	return env
}

func withEnv(env map[string]string, kv ...string) map[string]string {
	out := make(map[string]string, len(env)+len(kv)/2)
	for k, v := range env {
		out[k] = v
	}
	for i := 0; i+1 < len(kv); i += 2 {
		out[kv[i]] = kv[i+1]
	}
	return out
}

func envConfig(t testing.TB, env map[string]string) *config.Config {
	t.Helper()
	cfg, err := config.LoadEnv("", func(k string) (string, bool) { v, ok := env[k]; return v, ok })
	if err != nil {
		t.Fatal(err)
	}
	return cfg
}

// eventSet is a generated input: every record in order (good and malformed),
// and the good ones alone.
type eventSet struct {
	all, good string // JSON-lines files
	n, bad    int
	// badField maps a malformed record's text to the field its decode error
	// names, as the daemon's decoder reports it.
	badField map[string]string
}

// kafkaEvents writes n records: the demo scenario's events with every 100th
// record replaced by a malformed one (1%), cycling through an empty user, a
// rating off the scale and a record cut short. The good events are also
// written alone, in the same order, for the file replay.
func kafkaEvents(t *testing.T, env map[string]string, n int) eventSet {
	t.Helper()
	cfg := envConfig(t, env)
	so := scenarioOptions(cfg)
	so.Events = int64(n - n/100 + 1) // one spare: the last record may be a malformed one
	sc, err := stream.NewScenario(so, stream.Position{})
	if err != nil {
		t.Fatal(err)
	}
	defer sc.Close()
	dir := t.TempDir()
	es := eventSet{all: filepath.Join(dir, "all.jsonl"), good: filepath.Join(dir, "good.jsonl"), n: n, badField: map[string]string{}}
	var all, good, line []byte
	dec := stream.NewJSONDecoder(decodeOptions(cfg))
	var probe stream.Batch
	i := 0
	ctx := context.Background()
	for i < n {
		b, err := sc.Next(ctx)
		if err != nil {
			t.Fatalf("scenario ended after %d records: %v", i, err)
		}
		for j := range b.Events {
			if i%100 == 99 {
				var bad string
				switch (i / 100) % 3 {
				case 0:
					bad = fmt.Sprintf(`{"user":"","item":"show-%d","value":3,"time":1767225600000}`, i)
				case 1:
					bad = fmt.Sprintf(`{"user":"listener-%d","item":"show-1","value":%d,"time":1767225600000}`, i, 40+i%7)
				default:
					bad = fmt.Sprintf(`{"user":"listener-%d","item":"sh`, i)
				}
				probe.Reset()
				var de *stream.DecodeError
				if err := dec.Decode([]byte(bad), &probe); !errors.As(err, &de) {
					t.Fatalf("malformed record %s decodes (%v)", bad, err)
				}
				es.badField[bad] = de.Field
				all = append(append(all, bad...), '\n')
				es.bad++
				i++
				if i == n {
					break
				}
			}
			line = stream.AppendJSON(line[:0], &b.Events[j])
			all = append(append(all, line...), '\n')
			good = append(append(good, line...), '\n')
			i++
			if i == n {
				break
			}
		}
	}
	if err := os.WriteFile(es.all, all, 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(es.good, good, 0o644); err != nil {
		t.Fatal(err)
	}
	return es
}

// ensureTopics creates the events and dead-letter topics of env before any
// process joins the group or produces.
func ensureTopics(t *testing.T, env map[string]string) {
	t.Helper()
	cfg := envConfig(t, env)
	o, err := kafkaOptions(cfg, nil)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if err := kafka.EnsureTopics(ctx, o); err != nil {
		t.Fatal(err)
	}
}

// feed runs `freshet feed` as a process with args and returns it.
func feed(t *testing.T, env map[string]string, args ...string) *proc {
	t.Helper()
	return start(t, env, append([]string{"feed"}, args...)...)
}

// feedDone waits for a feed process and checks it wrote want records.
func feedDone(t *testing.T, p *proc, want int) {
	t.Helper()
	if code, sig := p.wait(kafkaTimeout); code != 0 || sig {
		t.Fatalf("feed exit code %d (signaled %v); stderr:\n%s\nstdout:\n%s", code, sig, p.dump(), p.stdout.String())
	}
	if out := p.stdout.String(); !strings.Contains(out, fmt.Sprintf("Records:%d ", want)) {
		t.Fatalf("feed wrote %q, want %d records", out, want)
	}
}

// plainClient is a client on its own transport: kafka-go's shared default
// transport caches metadata, and would not see a topic created after its
// first request. The transport's connections are closed with the test.
func plainClient(t *testing.T, broker string) *kgo.Client {
	tr := &kgo.Transport{}
	t.Cleanup(tr.CloseIdleConnections)
	return &kgo.Client{Addr: kgo.TCP(broker), Transport: tr, Timeout: 10 * time.Second}
}

// topicEnds returns each partition's end offset of topic.
func topicEnds(t *testing.T, broker, topic string) map[int]int64 {
	t.Helper()
	c := plainClient(t, broker)
	ctx := context.Background()
	md, err := c.Metadata(ctx, &kgo.MetadataRequest{Topics: []string{topic}})
	if err != nil {
		t.Fatal(err)
	}
	if len(md.Topics) != 1 || md.Topics[0].Error != nil {
		t.Fatalf("metadata of %s: %+v", topic, md.Topics)
	}
	var req []kgo.OffsetRequest
	for _, p := range md.Topics[0].Partitions {
		req = append(req, kgo.LastOffsetOf(p.ID))
	}
	resp, err := c.ListOffsets(ctx, &kgo.ListOffsetsRequest{Topics: map[string][]kgo.OffsetRequest{topic: req}})
	if err != nil {
		t.Fatal(err)
	}
	out := map[int]int64{}
	for _, po := range resp.Topics[topic] {
		if po.Error != nil {
			t.Fatal(po.Error)
		}
		out[po.Partition] = po.LastOffset
	}
	return out
}

// committed returns group's committed offset per partition of topic (-1:
// none), read with kafka-go's OffsetFetch.
func committed(t *testing.T, broker, group, topic string, partitions int) map[int]int64 {
	t.Helper()
	ps := make([]int, partitions)
	for i := range ps {
		ps[i] = i
	}
	resp, err := plainClient(t, broker).OffsetFetch(context.Background(), &kgo.OffsetFetchRequest{GroupID: group, Topics: map[string][]int{topic: ps}})
	if err != nil {
		t.Fatal(err)
	}
	out := map[int]int64{}
	for _, p := range resp.Topics[topic] {
		if p.Error != nil {
			t.Fatalf("offset fetch %s/%d: %v", topic, p.Partition, p.Error)
		}
		out[p.Partition] = p.CommittedOffset
	}
	return out
}

func sameOffsets(a, b map[int]int64) bool {
	if len(a) != len(b) {
		return false
	}
	for p, v := range a {
		if b[p] != v {
			return false
		}
	}
	return true
}

// waitCommitted polls until the group's committed offsets equal the end
// offsets (the daemon commits per flush, after the dead letters before an
// offset are acknowledged).
func waitCommitted(t *testing.T, broker, group, topic string, ends map[int]int64, timeout time.Duration) {
	t.Helper()
	deadline := time.Now().Add(timeout)
	for {
		got := committed(t, broker, group, topic, len(ends))
		if sameOffsets(got, ends) {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("committed offsets %v, want the end offsets %v", got, ends)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// readTopic reads every record of topic, partition by partition.
func readTopic(t *testing.T, broker, topic string) []kgo.Message {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	var out []kgo.Message
	for p, end := range topicEnds(t, broker, topic) {
		if end == 0 {
			continue
		}
		r := kgo.NewReader(kgo.ReaderConfig{Brokers: []string{broker}, Topic: topic, Partition: p, MaxWait: 300 * time.Millisecond})
		for {
			m, err := r.ReadMessage(ctx)
			if err != nil {
				r.Close()
				t.Fatalf("reading %s partition %d: %v", topic, p, err)
			}
			out = append(out, m)
			if m.Offset+1 >= end {
				break
			}
		}
		r.Close()
	}
	return out
}

func msgHeader(m kgo.Message, key string) (string, bool) {
	for _, h := range m.Headers {
		if h.Key == key {
			return string(h.Value), true
		}
	}
	return "", false
}

// checkDeadLetters reads the dead-letter topic and checks that each record
// carries its reason headers, that its value is the record at the source
// partition and offset its headers name, that its field header is what the
// decoder reports for those bytes, and that together they are exactly the
// malformed records. exact requires one dead letter per malformed record,
// for a run that was never stopped part-way. A run stopped part-way, cleanly
// or not, may leave some twice: the source's workers dead-letter a record when
// they decode it, ahead of the trainer, so the records of batches still
// queued (or applied after the last durable cut) at the stop are read and set
// aside again by the restart. Then distinct source offsets are counted, and
// the duplicates returned.
func checkDeadLetters(t *testing.T, broker, topic string, es eventSet, exact bool) (duplicates int) {
	t.Helper()
	source := map[string][]byte{}
	for _, m := range readTopic(t, broker, topic) {
		source[fmt.Sprintf("%d/%d", m.Partition, m.Offset)] = m.Value
	}
	dls := readTopic(t, broker, topic+".rejects")
	distinct := map[string]bool{}
	for _, m := range dls {
		field, ok1 := msgHeader(m, kafka.HeaderField)
		reason, ok2 := msgHeader(m, kafka.HeaderError)
		part, ok3 := msgHeader(m, kafka.HeaderSourcePartition)
		off, ok4 := msgHeader(m, kafka.HeaderSourceOffset)
		src, ok5 := msgHeader(m, kafka.HeaderSourceTopic)
		if !ok1 || !ok2 || !ok3 || !ok4 || !ok5 || reason == "" || src != topic {
			t.Fatalf("dead letter without its reason headers: %q %v", m.Value, m.Headers)
		}
		if orig, ok := source[part+"/"+off]; !ok || !bytes.Equal(orig, m.Value) {
			t.Fatalf("dead letter %q names %s/%s, where the topic holds %q", m.Value, part, off, orig)
		}
		want, known := es.badField[string(m.Value)]
		if !known {
			t.Fatalf("dead letter %q is not one of the malformed records", m.Value)
		}
		if field != want {
			t.Errorf("dead letter %q: field header %q, the decoder names %q", m.Value, field, want)
		}
		if !strings.Contains(reason, "partition "+part+" offset "+off) {
			t.Errorf("reason %q does not locate the record at %s/%s", reason, part, off)
		}
		distinct[part+"/"+off] = true
	}
	if len(distinct) != es.bad || (exact && len(dls) != es.bad) {
		t.Fatalf("%d distinct dead-lettered records (%d written), want the %d malformed ones", len(distinct), len(dls), es.bad)
	}
	return len(dls) - len(distinct)
}

// waitConsumed waits for a progress line of p (from line index from) whose
// applied plus rejected records reach n.
func waitConsumed(t *testing.T, p *proc, from int, n int) logLine {
	t.Helper()
	ln, _ := p.mustLine(from, kafkaTimeout, fmt.Sprintf("progress with %d records", n), func(l logLine) bool {
		return l.msg() == "progress" && l.uint(t, "events")+l.uint(t, "rejected") >= uint64(n)
	})
	return ln
}

// stopDaemon sends SIGTERM and requires a clean exit; it returns the
// "stopped" line.
func stopDaemon(t *testing.T, p *proc) logLine {
	t.Helper()
	p.signal(syscall.SIGTERM)
	if code, sig := p.wait(kafkaTimeout); code != 0 || sig {
		t.Fatalf("exit code %d (signaled %v) after SIGTERM, want 0; log:\n%s", code, sig, p.dump())
	}
	if strings.Contains(p.stderrText(), "stopped on error") {
		t.Fatalf("error during a clean stop:\n%s", p.dump())
	}
	ln, _ := p.mustLine(0, 0, "stopped", msgIs("stopped"))
	return ln
}

func relDiff(a, b float64) float64 {
	if a == b {
		return 0
	}
	return math.Abs(a-b) / math.Max(math.Abs(a), math.Abs(b))
}

// TestKafkaConsumeAll: 100,000 records with 1% malformed, sent by the feed
// subcommand, consumed by the daemon. Applied + dead-lettered = N, every dead
// letter carries its reason, the committed offsets reach the end offsets, and
// the final model and prequential figures match a file replay of the same
// good events: to 1e-9 relative with one partition (the same order, so the
// same steps), within 1% with four (the order across partitions differs, so
// the SGD path differs; the error it measures should not).
func TestKafkaConsumeAll(t *testing.T) {
	broker := testBroker(t, envTestKafka)
	const n = 100_000
	es := kafkaEvents(t, modelEnv(), n)

	// The file replay of the good events, shared by both subtests.
	fileEnv := withEnv(modelEnv(), "FRESHET_SOURCE_KIND", "file", "FRESHET_SOURCE_FILE_PATH", es.good)
	fileDir := t.TempDir()
	_, _, fileStop := runToEnd(t, fileDir, fileEnv)
	ref := recoverDir(t, fileDir, fileEnv)
	if ref.meta.Counts.Applied != uint64(n-es.bad) {
		t.Fatalf("file replay applied %d events, want %d", ref.meta.Counts.Applied, n-es.bad)
	}

	for _, parts := range []int{1, 4} {
		t.Run(fmt.Sprintf("partitions=%d", parts), func(t *testing.T) {
			topic, group := kafkaNames(t)
			env := kafkaEnv(broker, topic, group, parts)
			ensureTopics(t, env)
			t0 := time.Now()
			feedDone(t, feed(t, env, "-file", es.all, "-rate", "0", "-events", "0"), n)
			t.Logf("fed %d records in %s", n, time.Since(t0).Round(time.Millisecond))
			ends := topicEnds(t, broker, topic)
			total := int64(0)
			for _, e := range ends {
				total += e
			}
			if len(ends) != parts || total != n {
				t.Fatalf("topic end offsets %v, want %d records on %d partitions", ends, n, parts)
			}

			dir := t.TempDir()
			t1 := time.Now()
			p := start(t, env, "run", "-data", dir)
			waitConsumed(t, p, 0, n)
			el := time.Since(t1)
			waitCommitted(t, broker, group, topic, ends, 30*time.Second)
			stop := stopDaemon(t, p)
			t.Logf("daemon consumed %d records in %s (from start-up, including the group join)", n, el.Round(time.Millisecond))
			if !sameOffsets(committed(t, broker, group, topic, parts), ends) {
				t.Fatalf("committed offsets moved after the stop: %v, ends %v", committed(t, broker, group, topic, parts), ends)
			}

			got := recoverDir(t, dir, env)
			c := got.meta.Counts
			if c.Applied != uint64(n-es.bad) || c.Rejected != uint64(es.bad) || c.Applied+c.Rejected != n {
				t.Fatalf("checkpoint counts %+v, want %d applied + %d rejected = %d", c, n-es.bad, es.bad, n)
			}
			checkDeadLetters(t, broker, topic, es, true)

			// The prequential figures: with one partition every one of them
			// (faded, windowed, all-time) to 1e-9; with four the all-time RMSE
			// and MAE over the whole stream to 1% (the faded ones, with an
			// effective window of about 1/(1−α) = 1000 events, are noisier
			// than that between two event orders, and are only logged).
			ms, fs := monitorStatus(t, got, env), monitorStatus(t, ref, fileEnv)
			figures := []struct {
				name string
				a, b float64
				both bool // compared for every partition count
			}{
				{"rmse_all", math.Sqrt(ms.SquaredErrorTotal / float64(ms.Events)), math.Sqrt(fs.SquaredErrorTotal / float64(fs.Events)), true},
				{"mae_all", ms.AbsErrorTotal / float64(ms.Events), fs.AbsErrorTotal / float64(fs.Events), true},
				{"rmse_fading", stop.float(t, "rmse"), fileStop.float(t, "rmse"), false},
				{"mae_fading", stop.float(t, "mae"), fileStop.float(t, "mae"), false},
				{"rmse_window", stop.float(t, "rmse_window"), fileStop.float(t, "rmse_window"), false},
			}
			if ms.Events != fs.Events || ms.Events != uint64(n-es.bad) {
				t.Fatalf("monitor counted %d events from Kafka, %d from the file, want %d", ms.Events, fs.Events, n-es.bad)
			}
			for _, f := range figures {
				tol := 1e-9
				if parts > 1 {
					if !f.both {
						t.Logf("%s: Kafka %.9g, file %.9g (%.2f%% apart; not compared)", f.name, f.a, f.b, 100*relDiff(f.a, f.b))
						continue
					}
					tol = 0.01
				}
				if relDiff(f.a, f.b) > tol {
					t.Errorf("%s: %.12g from Kafka, %.12g from the file (tolerance %g relative)", f.name, f.a, f.b, tol)
				}
				t.Logf("%s: Kafka %.9g, file %.9g", f.name, f.a, f.b)
			}
			// The global mean does not depend on the order beyond round-off.
			gm, wm := got.meta.Model, ref.meta.Model
			if gm.MeanN != wm.MeanN || relDiff(gm.MeanSum, wm.MeanSum) > 1e-9 {
				t.Errorf("global mean sum %v over %v from Kafka, %v over %v from the file", gm.MeanSum, gm.MeanN, wm.MeanSum, wm.MeanN)
			}
			if parts == 1 {
				compareRowsRel(t, got, ref, 1e-9)
			}
		})
	}
}

// monitorStatus restores the prequential monitor of a recovered cut.
func monitorStatus(t *testing.T, d durable, env map[string]string) online.MonitorStatus {
	t.Helper()
	_, mon, err := newModel(envConfig(t, env))
	if err != nil {
		t.Fatal(err)
	}
	if err := mon.UnmarshalState(d.meta.Monitor); err != nil {
		t.Fatal(err)
	}
	return mon.Status()
}

// compareRowsRel requires the same rows, by ID, with biases and factors equal
// to within tol relative (absolute below 1e-12, for values that are 0).
func compareRowsRel(t *testing.T, got, want durable, tol float64) {
	t.Helper()
	for s := online.Users; s <= online.Items; s++ {
		g, w := got.rows[s], want.rows[s]
		if g.Len() != w.Len() {
			t.Fatalf("%s table: %d rows from Kafka, %d from the file", s, g.Len(), w.Len())
		}
		idx := make(map[string]int, w.Len())
		for j := range w.Recs {
			idx[string(w.Recs[j].ID)] = j
		}
		near := func(a, b float64) bool { return math.Abs(a-b) <= 1e-12 || relDiff(a, b) <= tol }
		for j := range g.Recs {
			gr := &g.Recs[j]
			k, ok := idx[string(gr.ID)]
			if !ok {
				t.Fatalf("%s %q only in the Kafka model", s, gr.ID)
			}
			wr := &w.Recs[k]
			if gr.Count != wr.Count || !near(float64(gr.Bias), float64(wr.Bias)) {
				t.Fatalf("%s %q: bias %v count %d from Kafka, %v %d from the file", s, gr.ID, gr.Bias, gr.Count, wr.Bias, wr.Count)
			}
			for f := range gr.Vec {
				if !near(float64(gr.Vec[f]), float64(wr.Vec[f])) {
					t.Fatalf("%s %q factor %d: %v from Kafka, %v from the file", s, gr.ID, f, gr.Vec[f], wr.Vec[f])
				}
			}
		}
	}
}

// interruptRun is the setup of a stop-and-restart test: generated events,
// the daemon's environment and data directory, and the topics (created).
type interruptRun struct {
	es            eventSet
	env           map[string]string
	dir           string
	broker, topic string
	group         string
}

func startInterrupted(t *testing.T, parts int) *interruptRun {
	t.Helper()
	broker := testBroker(t, envTestKafka)
	const n = 100_000
	topic, group := kafkaNames(t)
	env := kafkaEnv(broker, topic, group, parts)
	r := &interruptRun{es: kafkaEvents(t, env, n), env: env, dir: t.TempDir(), broker: broker, topic: topic, group: group}
	ensureTopics(t, env)
	return r
}

// TestKafkaSIGTERMResume: SIGTERM while the feed is still sending; the
// restart resumes at the stopped position with the stopped count, and after
// the rest the counts add up to N exactly (a clean stop re-applies nothing)
// and the committed offsets reach the ends.
func TestKafkaSIGTERMResume(t *testing.T) {
	r := startInterrupted(t, 2)
	n := r.es.n
	// The daemon joins its group first, so that the feed (about 4 s) is
	// still sending when the stop comes, however slow the start-up.
	p := start(t, r.env, "run", "-data", r.dir)
	p.mustLine(0, kafkaTimeout, "started", msgIs("started"))
	f := feed(t, r.env, "-file", r.es.all, "-rate", "25000", "-events", "0")
	p.mustLine(0, kafkaTimeout, "progress part-way", func(l logLine) bool {
		return l.msg() == "progress" && l.uint(t, "events") >= 15000
	})
	stop1 := stopDaemon(t, p)
	e1, pos1 := stop1.uint(t, "events"), stop1.str("position")
	if e1+stop1.uint(t, "rejected") >= uint64(n) {
		t.Fatalf("the first run consumed everything (%d events) before the stop; feed too fast", e1)
	}
	d1 := recoverDir(t, r.dir, r.env)
	if d1.meta.Counts.Applied != e1 || d1.meta.Position.String() != pos1 {
		t.Fatalf("checkpoint holds %d events at %s; the stop logged %d at %s", d1.meta.Counts.Applied, d1.meta.Position, e1, pos1)
	}

	q := start(t, r.env, "run", "-data", r.dir)
	resumed, i := q.mustLine(0, kafkaTimeout, "resumed", msgIs("resumed"))
	if resumed.str("position") != pos1 || resumed.uint(t, "events") != e1 {
		t.Fatalf("resumed %s; stopped at %d events, %s", resumed.Raw, e1, pos1)
	}
	feedDone(t, f, n)
	ends := topicEnds(t, r.broker, r.topic)
	waitConsumed(t, q, i, n)
	waitCommitted(t, r.broker, r.group, r.topic, ends, 30*time.Second)
	stopDaemon(t, q)
	c := recoverDir(t, r.dir, r.env).meta.Counts
	if c.Applied != uint64(n-r.es.bad) || c.Rejected != uint64(r.es.bad) {
		t.Fatalf("counts %+v after the restart, want %d applied + %d rejected = %d", c, n-r.es.bad, r.es.bad, n)
	}
	dup := checkDeadLetters(t, r.broker, r.topic, r.es, false)
	t.Logf("stopped at %d events (%s), resumed there, finished at %d applied + %d rejected; %d dead letters written twice", e1, pos1, c.Applied, c.Rejected, dup)
}

// TestKafkaKillResume: kill -9 while the feed is still sending; the restart
// resumes at the last durable cut, re-applies at most one flush interval's
// worth of events plus one batch, and nothing is lost: the final applied
// count is the number of good events exactly.
//
// Re-applied events, and why they are harmless. The killed run had applied
// some events after its newest durable cut: at most one flush interval's
// worth plus the batch in hand, since a cut is taken at the first batch
// boundary after each flush interval. The restart loads that cut and the
// source resumes at the cut's position, so those events are applied again,
// but to the cut's state, which never saw them: the durable model learns each
// event once. The counts (applied, rejected, the prequential monitor's sums)
// are part of the cut, so they restore with the state and count each event
// once too. Where a re-delivery does reach a model that has already learned
// the event (a commit lost to a rebalance), it costs one repeated SGD step:
// one more small, regularised move along the same residual, which the first
// step has already shrunk, for at most the same window of events; the model
// moves no more than it would for a listener repeating those ratings.
func TestKafkaKillResume(t *testing.T) {
	r := startInterrupted(t, 2)
	n := r.es.n
	p := start(t, r.env, "run", "-data", r.dir)
	p.mustLine(0, kafkaTimeout, "started", msgIs("started"))
	f := feed(t, r.env, "-file", r.es.all, "-rate", "25000", "-events", "0")
	_, i := p.mustLine(0, kafkaTimeout, "progress part-way", func(l logLine) bool {
		return l.msg() == "progress" && l.uint(t, "events") >= 15000
	})
	// Let it run a little past the line, then kill it between progress
	// lines.
	time.Sleep(130 * time.Millisecond)
	if err := p.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	if _, sig := p.wait(kafkaTimeout); !sig {
		t.Fatalf("the first run was not killed; log:\n%s", p.dump())
	}
	var last uint64
	rateMax := 0.0
	for _, l := range p.snapshot()[i:] {
		if l.msg() == "progress" {
			last = l.uint(t, "events")
			rateMax = math.Max(rateMax, l.float(t, "events_per_s"))
		}
	}
	if last+uint64(r.es.bad) >= uint64(n) {
		t.Fatalf("the first run consumed everything (%d events) before the kill; feed too fast", last)
	}

	q := start(t, r.env, "run", "-data", r.dir)
	first, j := q.mustLine(0, kafkaTimeout, "first trainer line", func(l logLine) bool { return l.str("logger") == "trainer" })
	var resumedAt uint64
	if first.msg() == "resumed" {
		resumedAt = first.uint(t, "events")
	}
	// The bound: a cut is taken at the first batch boundary after each
	// flush interval, so the applied work not yet durable at any instant is
	// at most one flush interval at the run's rate plus the batch in hand,
	// plus what was applied while the newest cut's fsync ran (50 ms more
	// allowed, for a busy shared disk). The rate is the fastest progress
	// line's, taken 1.5 times for bursts within a line. The feed's rate (25k
	// events/s) caps the consumer's once it has caught up.
	batch := int64(envConfig(t, r.env).Source.BatchSize)
	bound := int64(1.5*rateMax*(kafkaFlush+50*time.Millisecond).Seconds()) + batch
	reapplied := int64(last) - int64(resumedAt)
	t.Logf("killed with at least %d events applied (%.0f events/s max); resumed at %d: %d re-applied (bound %d)", last, rateMax, resumedAt, reapplied, bound)
	if reapplied > bound {
		t.Errorf("re-applied %d events, more than one flush interval plus a batch (%d)", reapplied, bound)
	}
	if first.msg() == "resumed" {
		// The exact count, from the checkpoint's mark (written at every
		// batch boundary before the progress line, so at least the logs').
		exact := int64(first.uint(t, "reapply"))
		t.Logf("the mark says %d events re-applied", exact)
		if exact < reapplied || exact > bound {
			t.Errorf("%d events re-applied by the mark; want at least %d (the logs) and at most %d", exact, reapplied, bound)
		}
	}
	if first.msg() != "resumed" {
		t.Errorf("the restart found nothing durable after %d events (first cut due after %s); first line %s", last, kafkaFlush, first.Raw)
	}

	feedDone(t, f, n)
	ends := topicEnds(t, r.broker, r.topic)
	waitConsumed(t, q, j, n)
	waitCommitted(t, r.broker, r.group, r.topic, ends, 30*time.Second)
	stopDaemon(t, q)
	c := recoverDir(t, r.dir, r.env).meta.Counts
	if c.Applied != uint64(n-r.es.bad) || c.Rejected != uint64(r.es.bad) {
		t.Fatalf("counts %+v after kill -9 and restart, want exactly %d applied + %d rejected", c, n-r.es.bad, r.es.bad)
	}
	dup := checkDeadLetters(t, r.broker, r.topic, r.es, false)
	t.Logf("%d dead letters written twice", dup)
}

// TestKafkaSecondDaemonRefused: a second daemon for the same model (same
// group, its own data directory) fails with the lease error and a non-zero
// exit, and the first goes on undisturbed.
func TestKafkaSecondDaemonRefused(t *testing.T) {
	broker := testBroker(t, envTestKafka)
	topic, group := kafkaNames(t)
	env := kafkaEnv(broker, topic, group, 2)
	ensureTopics(t, env)
	first := start(t, env, "run", "-data", t.TempDir())
	first.mustLine(0, kafkaTimeout, "started", msgIs("started"))

	t0 := time.Now()
	second := start(t, env, "run", "-data", t.TempDir())
	code, sig := second.wait(kafkaTimeout)
	el := time.Since(t0)
	if code == 0 || sig {
		t.Fatalf("second daemon exit code %d (signaled %v), want a failure; log:\n%s", code, sig, second.dump())
	}
	msg := second.stderrText()
	if !strings.Contains(msg, "group "+strconv.Quote(group)) || !strings.Contains(msg, "already has") || !strings.Contains(msg, "another source is consuming for this model") {
		t.Fatalf("second daemon's error does not say the model's group is taken:\n%s", msg)
	}
	// It waits one session timeout (2 s) for members left by a crash, then
	// refuses: well under a minute even on a loaded machine.
	if el > 30*time.Second {
		t.Errorf("the refusal took %s", el)
	}
	t.Logf("second daemon refused after %s", el.Round(time.Millisecond))

	// The first one still consumes.
	es := kafkaEvents(t, env, 2000)
	feedDone(t, feed(t, env, "-file", es.all, "-rate", "0", "-events", "0"), 2000)
	waitConsumed(t, first, 0, 2000)
	stopDaemon(t, first)
}

// TestKafkaSASL: SCRAM-SHA-512 on the broker's SASL listener (the test user
// is added when deploy/kafka.sh formats the storage). The right password lets
// the feed and the daemon work; a wrong one ends the daemon quickly with an
// authentication error and a non-zero exit, after few attempts.
func TestKafkaSASL(t *testing.T) {
	addr := testBroker(t, envTestKafkaSASL)
	user, pass := os.Getenv(envTestSASLUser), os.Getenv(envTestSASLPass)
	if user == "" || pass == "" {
		t.Fatalf("%s is set but %s or %s is not", envTestKafkaSASL, envTestSASLUser, envTestSASLPass)
	}
	const pwVar = "E2E_KAFKA_PASSWORD" // outside FRESHET_: it holds the secret, not a key
	topic, group := kafkaNames(t)
	env := withEnv(kafkaEnv(addr, topic, group, 1),
		"FRESHET_KAFKA_SASL_MECHANISM", "scram-sha-512",
		"FRESHET_KAFKA_SASL_USERNAME", user,
		"FRESHET_KAFKA_SASL_PASSWORD_ENV", pwVar,
		pwVar, pass)

	t.Run("right password", func(t *testing.T) {
		const n = 3000
		es := kafkaEvents(t, env, n)
		feedDone(t, feed(t, env, "-file", es.all, "-rate", "0", "-events", "0"), n)
		p := start(t, env, "run", "-data", t.TempDir())
		waitConsumed(t, p, 0, n)
		stopDaemon(t, p)
		if strings.Contains(p.stderrText(), pass) {
			t.Fatalf("the password appears in the log")
		}
	})
	// With topic creation on, the first connection is the topic check; off
	// (the topics exist from the run above), it is the group's.
	for _, create := range []string{"true", "false"} {
		t.Run("wrong password/create_topics="+create, func(t *testing.T) {
			bad := withEnv(env, pwVar, pass+"-wrong", "FRESHET_KAFKA_GROUP", group+"-w"+create, "FRESHET_KAFKA_CREATE_TOPICS", create)
			t0 := time.Now()
			p := start(t, bad, "run", "-data", t.TempDir())
			code, sig := p.wait(kafkaTimeout)
			el := time.Since(t0)
			if code == 0 || sig {
				t.Fatalf("exit code %d (signaled %v) with a wrong password, want a failure; log:\n%s", code, sig, p.dump())
			}
			text := p.stderrText()
			low := strings.ToLower(text)
			if !strings.Contains(low, "sasl") && !strings.Contains(low, "authentication") {
				t.Fatalf("the error does not say authentication failed:\n%s", text)
			}
			if strings.Contains(text, pass) {
				t.Fatalf("the password appears in the log")
			}
			if strings.Contains(text, "kafka: kafka:") {
				t.Errorf("the error repeats its prefix:\n%s", text)
			}
			// Not a retry storm: a failed authentication is final, so the
			// daemon ends within seconds having logged only a few lines.
			lines := len(p.snapshot())
			t.Logf("refused after %s with %d log lines: %s", el.Round(time.Millisecond), lines, strings.TrimSpace(p.snapshot()[lines-1].Raw))
			if el > 20*time.Second || lines > 20 {
				t.Errorf("a wrong password took %s and %d log lines to end the daemon", el, lines)
			}
		})
	}
}

// TestKafkaFeedKeys: the feed subcommand writes the demo keyed by user, each
// record on the partition kafka-go's Murmur2Balancer (the Java client's
// murmur2 placement, per kafka-go's documentation of that balancer) gives its
// key, so every listener's events stay on one partition, in order.
func TestKafkaFeedKeys(t *testing.T) {
	broker := testBroker(t, envTestKafka)
	const n, parts = 5000, 4
	topic, group := kafkaNames(t)
	env := kafkaEnv(broker, topic, group, parts)
	ensureTopics(t, env)
	feedDone(t, feed(t, env, "-rate", "0", "-events", strconv.Itoa(n)), n)
	msgs := readTopic(t, broker, topic)
	if len(msgs) != n {
		t.Fatalf("topic holds %d records, want %d", len(msgs), n)
	}
	ps := make([]int, parts)
	for i := range ps {
		ps[i] = i
	}
	bal := &kgo.Murmur2Balancer{}
	home := map[string]int{}
	used := map[int]int{}
	dec := stream.NewJSONDecoder(stream.DecodeOptions{})
	var b stream.Batch
	for _, m := range msgs {
		b.Reset()
		if err := dec.Decode(m.Value, &b); err != nil || b.Len() != 1 {
			t.Fatalf("record %q does not decode: %v", m.Value, err)
		}
		if !bytes.Equal(m.Key, b.Events[0].User) {
			t.Fatalf("record key %q, user %q", m.Key, b.Events[0].User)
		}
		if want := bal.Balance(kgo.Message{Key: m.Key}, ps...); m.Partition != want {
			t.Fatalf("key %q on partition %d; murmur2 places it on %d", m.Key, m.Partition, want)
		}
		if h, ok := home[string(m.Key)]; ok && h != m.Partition {
			t.Fatalf("user %q on partitions %d and %d", m.Key, h, m.Partition)
		}
		home[string(m.Key)] = m.Partition
		used[m.Partition]++
	}
	if len(used) != parts {
		t.Errorf("records on %d of %d partitions: %v", len(used), parts, used)
	}
	// A few fixed keys against murmur2 computed here from its definition
	// (the Java client's Utils.murmur2 and toPositive, from memory):
	// placement = (murmur2(key) & 0x7fffffff) % partitions.
	for _, k := range []string{"listener-0", "listener-17", "listener-2999"} {
		if got, want := bal.Balance(kgo.Message{Key: []byte(k)}, ps...), int(murmur2([]byte(k))&0x7fffffff)%parts; got != want {
			t.Errorf("key %q: Murmur2Balancer %d, murmur2 %d", k, got, want)
		}
	}
	t.Logf("%d records from %d listeners on partitions %v", n, len(home), used)
}

// murmur2 is the 32-bit MurmurHash2 with the seed the Java Kafka client uses
// (0x9747b28c), written out from the algorithm: m = 0x5bd1e995, r = 24;
// h = seed ^ len; per 4-byte little-endian word k: k *= m; k ^= k >> r;
// k *= m; h *= m; h ^= k; then the tail bytes, and h ^= h >> 13; h *= m;
// h ^= h >> 15.
func murmur2(data []byte) uint32 {
	const seed, m, r = 0x9747b28c, 0x5bd1e995, 24
	h := uint32(seed) ^ uint32(len(data))
	n := len(data) / 4
	for i := 0; i < n; i++ {
		k := uint32(data[4*i]) | uint32(data[4*i+1])<<8 | uint32(data[4*i+2])<<16 | uint32(data[4*i+3])<<24
		k *= m
		k ^= k >> r
		k *= m
		h *= m
		h ^= k
	}
	tail := data[4*n:]
	switch len(tail) {
	case 3:
		h ^= uint32(tail[2]) << 16
		fallthrough
	case 2:
		h ^= uint32(tail[1]) << 8
		fallthrough
	case 1:
		h ^= uint32(tail[0])
		h *= m
	}
	h ^= h >> 13
	h *= m
	h ^= h >> 15
	return h
}
