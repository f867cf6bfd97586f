package main

import (
	"context"
	"io"
	"sync"
	"testing"
	"time"

	"go.uber.org/zap"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/checkpoint"
	"freshet.dev/freshet/stream"
	"freshet.dev/freshet/stream/kafka"
)

// pipelineEvents and pipelineParts size the benchmark topic: the demo
// scenario's events as JSON, keyed by listener, on two partitions (one
// reader per partition, so consuming can overlap training on the two cores).
const (
	pipelineEvents = 300_000
	pipelineParts  = 2
)

var (
	pipeOnce sync.Once
	pipeEnv  map[string]string
	pipeErr  error
)

// pipelineTopic fills the benchmark topic once per test binary and returns
// the environment naming it (a fresh group is chosen per pass).
func pipelineTopic(b *testing.B) map[string]string {
	broker := testBroker(b, envTestKafka)
	pipeOnce.Do(func() {
		topic, group := kafkaNames(b)
		env := kafkaEnv(broker, topic, group, pipelineParts)
		// The production defaults for the checkpoint and progress
		// periods, not the tests' short ones.
		delete(env, "FRESHET_CHECKPOINT_FLUSH_INTERVAL")
		delete(env, "FRESHET_MONITOR_PROGRESS_INTERVAL")
		env["FRESHET_MODEL_RANK"] = "32"
		env["FRESHET_SOURCE_SCENARIO_LISTENERS"] = "50000"
		env["FRESHET_SOURCE_SCENARIO_SHOWS"] = "5000"
		cfg := envConfig(b, env)
		o, err := kafkaOptions(cfg, zap.NewNop())
		if err != nil {
			pipeErr = err
			return
		}
		ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
		defer cancel()
		if pipeErr = kafka.EnsureTopics(ctx, o); pipeErr != nil {
			return
		}
		so := scenarioOptions(cfg)
		so.Events = pipelineEvents
		sc, err := stream.NewScenario(so, stream.Position{})
		if err != nil {
			pipeErr = err
			return
		}
		defer sc.Close()
		st, err := kafka.Produce(ctx, kafka.ProduceOptions{Brokers: o.Brokers, Topic: o.Topic, Chunk: 5000}, scenarioRecords(ctx, sc))
		if err == nil && st.Records != pipelineEvents {
			err = io.ErrUnexpectedEOF
		}
		pipeEnv, pipeErr = env, err
	})
	if pipeErr != nil || pipeEnv == nil {
		b.Fatalf("benchmark topic setup failed: %v", pipeErr)
	}
	return pipeEnv
}

// pipelineDecoder adds a fixed event per record without reading it: the
// consume-only baseline (the same workers and batching, no JSON decode).
type pipelineDecoder struct{}

var pipeUser, pipeItem = []byte("u"), []byte("i")

func (pipelineDecoder) Decode(rec []byte, b *stream.Batch) error {
	b.Add(stream.Event{User: pipeUser, Item: pipeItem, Value: float64(len(rec))})
	return nil
}

// limitSource ends a source (io.EOF) once n records have been handed over,
// so that the trainer drains (final cut and commit) at the end of the topic.
type limitSource struct {
	*kafka.Source
	left int
}

func (s *limitSource) Next(ctx context.Context) (*stream.Batch, error) {
	if s.left <= 0 {
		return nil, io.EOF
	}
	b, err := s.Source.Next(ctx)
	if err == nil {
		s.left -= b.Len() + b.Rejected
	}
	return b, err
}

// newPipelineSource joins a fresh group on the benchmark topic, with the
// daemon's decoder or, when raw, the no-op one.
func newPipelineSource(b *testing.B, env map[string]string, raw bool) *kafka.Source {
	b.Helper()
	_, group := kafkaNames(b)
	cfg := envConfig(b, withEnv(env, "FRESHET_KAFKA_GROUP", group))
	o, err := kafkaOptions(cfg, zap.NewNop())
	if err != nil {
		b.Fatal(err)
	}
	if raw {
		o.NewDecoder = func() stream.Decoder { return pipelineDecoder{} }
	}
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	src, err := kafka.New(ctx, o, stream.Position{})
	if err != nil {
		b.Fatal(err)
	}
	return src
}

// rawPass reads the whole topic with the no-op decoder and returns the time
// from the group join to the last commit. It commits after every batch when
// every is 0, else at the first batch boundary after each period every (the
// trainer's cadence: one commit per durable cut), and after the last batch.
func rawPass(b *testing.B, env map[string]string, every time.Duration) time.Duration {
	b.Helper()
	src := newPipelineSource(b, env, true)
	defer src.Close()
	ctx := context.Background()
	t0 := time.Now()
	last := t0
	for got := 0; got < pipelineEvents; {
		bt, err := src.Next(ctx)
		if err != nil {
			b.Fatal(err)
		}
		got += bt.Len() + bt.Rejected
		if now := time.Now(); every == 0 || now.Sub(last) >= every || got >= pipelineEvents {
			last = now
			if err := src.Commit(ctx, bt.Pos); err != nil {
				b.Fatal(err)
			}
		}
	}
	return time.Since(t0)
}

// fullPass runs the daemon's pipeline over the whole topic: consume, decode,
// SGD step (with the prequential monitor), checkpoint log (a real store on a
// temporary directory, fsynced per cut), commit per cut. It returns the time
// from the group join to the end of the trainer's drain (the final durable
// cut and its commit).
func fullPass(b *testing.B, env map[string]string) time.Duration {
	b.Helper()
	cfg := envConfig(b, env)
	m, mon, err := newModel(cfg)
	if err != nil {
		b.Fatal(err)
	}
	store, err := checkpoint.Open(checkpoint.Options{Dir: b.TempDir()})
	if err != nil {
		b.Fatal(err)
	}
	defer store.Close()
	src := newPipelineSource(b, env, false)
	defer src.Close()
	to := trainerOptions(cfg)
	to.Model, to.Monitor, to.Checkpoint = m, mon, store
	to.Source = &limitSource{Source: src, left: pipelineEvents}
	to.Progress = -1
	tr, err := online.NewTrainer(to)
	if err != nil {
		b.Fatal(err)
	}
	t0 := time.Now()
	if err := tr.Run(context.Background()); err != nil {
		b.Fatal(err)
	}
	el := time.Since(t0)
	if c := tr.Counts(); c.Applied != pipelineEvents {
		b.Fatalf("applied %d events, want %d", c.Applied, pipelineEvents)
	}
	return el
}

// BenchmarkPipeline measures the daemon's Kafka path in events/s against a
// raw consume-only loop over the same pre-filled topic (300,000 demo events,
// two partitions, rank 32) in the same run, each pass through a fresh group.
// "compare" runs, per iteration, the raw loop committing after every batch
// (raw-events/s; ratio is the pipeline's rate over it, target ≥ 0.6 with the
// broker on the same two cores), the raw loop committing once per flush
// interval like the trainer (raw-flushcommit-events/s and ratio-flushcommit:
// the same commit cadence on both sides, so the ratio shows the cost of
// decode, SGD and checkpoint alone), and the pipeline. On loopback a
// synchronous commit costs about a millisecond, so the per-batch raw loop is
// bound by its ~1,200 commits. "full" runs the pipeline alone, for a CPU
// profile of it. The group join is outside the timing; the final cut and
// commit are inside. ns/op is not meaningful.
func BenchmarkPipeline(b *testing.B) {
	b.Run("compare", func(b *testing.B) {
		env := pipelineTopic(b)
		flush := envConfig(b, env).Checkpoint.FlushInterval
		var raw, rawFlush, full time.Duration
		for i := 0; i < b.N; i++ {
			raw += rawPass(b, env, 0)
			rawFlush += rawPass(b, env, flush)
			full += fullPass(b, env)
		}
		events := float64(b.N * pipelineEvents)
		rawRate, rawFlushRate, fullRate := events/raw.Seconds(), events/rawFlush.Seconds(), events/full.Seconds()
		b.ReportMetric(rawRate, "raw-events/s")
		b.ReportMetric(rawFlushRate, "raw-flushcommit-events/s")
		b.ReportMetric(fullRate, "pipeline-events/s")
		b.ReportMetric(fullRate/rawRate, "ratio")
		b.ReportMetric(fullRate/rawFlushRate, "ratio-flushcommit")
		b.ReportMetric(0, "ns/op")
	})
	b.Run("full", func(b *testing.B) {
		env := pipelineTopic(b)
		var full time.Duration
		for i := 0; i < b.N; i++ {
			full += fullPass(b, env)
		}
		b.ReportMetric(float64(b.N*pipelineEvents)/full.Seconds(), "pipeline-events/s")
		b.ReportMetric(0, "ns/op")
	})
}
