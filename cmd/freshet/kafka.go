package main

import (
	"bufio"
	"bytes"
	"context"
	"crypto/tls"
	"crypto/x509"
	"flag"
	"fmt"
	"io"
	"iter"
	"os"
	"time"

	"go.uber.org/zap"

	"freshet.dev/freshet/config"
	"freshet.dev/freshet/stream"
	"freshet.dev/freshet/stream/kafka"
)

// tlsConfig builds a client TLS configuration from a config section; nil
// when TLS is off.
func tlsConfig(c config.TLS) (*tls.Config, error) {
	if !c.Enabled {
		return nil, nil
	}
	tc := &tls.Config{ServerName: c.ServerName, InsecureSkipVerify: c.InsecureSkipVerify, MinVersion: tls.VersionTLS12}
	if c.CAFile != "" {
		pem, err := os.ReadFile(c.CAFile)
		if err != nil {
			return nil, fmt.Errorf("tls: read ca_file: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("tls: ca_file %s holds no PEM certificate", c.CAFile)
		}
		tc.RootCAs = pool
	}
	if c.CertFile != "" {
		cert, err := tls.LoadX509KeyPair(c.CertFile, c.KeyFile)
		if err != nil {
			return nil, fmt.Errorf("tls: load client certificate: %w", err)
		}
		tc.Certificates = []tls.Certificate{cert}
	}
	return tc, nil
}

// kafkaSecurity builds the connection security of the kafka section.
func kafkaSecurity(k config.Kafka) (kafka.Security, error) {
	var sec kafka.Security
	tc, err := tlsConfig(k.TLS)
	if err != nil {
		return sec, asUsage(fmt.Errorf("kafka.%w", err))
	}
	sec.TLS = tc
	if k.SASL.Mechanism != "" {
		m, err := kafka.SASL(k.SASL.Mechanism, k.SASL.Username, k.SASL.Password.Reveal())
		if err != nil {
			return sec, asUsage(fmt.Errorf("kafka.sasl: %w", err))
		}
		sec.SASL = m
	}
	return sec, nil
}

// kafkaOptions maps the kafka section onto the source's options.
func kafkaOptions(cfg *config.Config, log *zap.Logger) (kafka.Options, error) {
	k := cfg.Kafka
	sec, err := kafkaSecurity(k)
	if err != nil {
		return kafka.Options{}, err
	}
	start := kafka.FirstOffset
	if k.Start == "latest" {
		start = kafka.LastOffset
	}
	dec := decodeOptions(cfg)
	dlt := k.DeadLetterTopic
	if dlt == "" {
		dlt = k.Topic + ".rejects"
	}
	return kafka.Options{
		Brokers:           k.Brokers,
		Topic:             k.Topic,
		GroupID:           k.Group,
		DeadLetterTopic:   dlt,
		Start:             start,
		MinBytes:          k.MinBytes,
		MaxBytes:          k.MaxBytes,
		MaxWait:           k.MaxWait,
		SessionTimeout:    k.SessionTimeout,
		BatchSize:         cfg.Source.BatchSize,
		Partitions:        k.Partitions,
		ReplicationFactor: k.Replication,
		Security:          sec,
		NewDecoder:        func() stream.Decoder { return stream.NewJSONDecoder(dec) },
		Logger:            log,
	}, nil
}

// newKafkaSource creates or checks the topics, then joins the group and
// starts the assigned partitions at from.
func newKafkaSource(ctx context.Context, cfg *config.Config, from stream.Position, log *zap.Logger) (stream.Source, error) {
	o, err := kafkaOptions(cfg, log.Named("kafka"))
	if err != nil {
		return nil, err
	}
	// Bound the start-up work: joining waits for a stale member's session
	// to expire, so allow that plus a margin.
	ctx, cancel := context.WithTimeout(ctx, 2*cfg.Kafka.SessionTimeout+time.Minute)
	defer cancel()
	if cfg.Kafka.CreateTopics {
		if err := kafka.EnsureTopics(ctx, o); err != nil {
			return nil, fmt.Errorf("creating topics: %w", err) // err starts with "kafka: "
		}
	}
	src, err := kafka.New(ctx, o, from)
	if err != nil {
		return nil, err // starts with "kafka: " already
	}
	return src, nil
}

// runFeed writes the demo scenario, or a file of JSON lines, to the
// configured topic at a target rate, keyed by user: a load generator for
// trying the daemon against a real broker.
func runFeed(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("feed", flag.ContinueOnError)
	fs.SetOutput(stderr)
	cfgPath := fs.String("config", "", "configuration `file`: the kafka section names brokers and topic; the scenario section the demo")
	file := fs.String("file", "", "JSON-lines `file` to send instead of the demo scenario")
	rate := fs.Float64("rate", 50000, "target `events` per second (0: as fast as the broker takes them)")
	events := fs.Int64("events", 100000, "stop after this many `events` (0: until the input ends)")
	dur := fs.Duration("for", 0, "stop after this long (0: no limit)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	cfg, err := loadConfig(*cfgPath, "")
	if err != nil {
		return err
	}
	if len(cfg.Kafka.Brokers) == 0 || cfg.Kafka.Topic == "" {
		return usagef("feed: kafka.brokers and kafka.topic must be set")
	}
	if *file == "" && *events == 0 && *dur == 0 {
		return usagef("feed: the demo is endless; give -events or -for")
	}
	sec, err := kafkaSecurity(cfg.Kafka)
	if err != nil {
		return err
	}
	var recs iter.Seq[kafka.Record]
	var closeInput func() error
	if *file != "" {
		f, err := os.Open(*file)
		if err != nil {
			return asUsage(err)
		}
		recs, closeInput = fileRecords(f), f.Close
	} else {
		so := scenarioOptions(cfg)
		so.Events = *events
		sc, err := stream.NewScenario(so, stream.Position{})
		if err != nil {
			return asUsage(err)
		}
		recs, closeInput = scenarioRecords(ctx, sc), sc.Close
	}
	defer closeInput()
	if cfg.Kafka.CreateTopics {
		o, err := kafkaOptions(cfg, zap.NewNop())
		if err != nil {
			return err
		}
		if err := kafka.EnsureTopics(ctx, o); err != nil {
			return fmt.Errorf("feed: create topics: %w", err)
		}
	}
	start := time.Now()
	st, err := kafka.Produce(ctx, kafka.ProduceOptions{
		Brokers: cfg.Kafka.Brokers, Topic: cfg.Kafka.Topic, Security: sec,
		Rate: *rate, Max: *events, MaxDuration: *dur,
	}, recs)
	el := time.Since(start)
	fmt.Fprintf(stdout, "wrote %+v in %s (%.0f events/s)\n", st, el.Round(time.Millisecond), float64(st.Records)/el.Seconds())
	return err
}

// scenarioRecords yields the scenario's events as JSON records keyed by user.
func scenarioRecords(ctx context.Context, sc *stream.Scenario) iter.Seq[kafka.Record] {
	return func(yield func(kafka.Record) bool) {
		var buf []byte
		for {
			b, err := sc.Next(ctx)
			if err != nil {
				return
			}
			for i := range b.Events {
				ev := &b.Events[i]
				buf = stream.AppendJSON(buf[:0], ev)
				if !yield(kafka.Record{Key: ev.User, Value: buf}) {
					return
				}
			}
		}
	}
}

// fileRecords yields the lines of a JSON-lines file keyed by their user
// field; lines that do not decode are sent unkeyed, as they are, so the
// daemon's dead-letter path sees them.
func fileRecords(r io.Reader) iter.Seq[kafka.Record] {
	return func(yield func(kafka.Record) bool) {
		dec := stream.NewJSONDecoder(stream.DecodeOptions{})
		var b stream.Batch
		sc := bufio.NewScanner(r)
		sc.Buffer(make([]byte, 64<<10), stream.MaxLineLen+2)
		for sc.Scan() {
			line := bytes.TrimSuffix(sc.Bytes(), []byte("\r"))
			if len(line) == 0 {
				continue
			}
			b.Reset()
			var key []byte
			if dec.Decode(line, &b) == nil && b.Len() == 1 {
				key = b.Events[0].User
			}
			if !yield(kafka.Record{Key: key, Value: line}) {
				return
			}
		}
	}
}
