package kafka

import (
	"crypto/tls"
	"errors"
	"fmt"
	"strings"
	"time"

	kgo "github.com/segmentio/kafka-go"
	"github.com/segmentio/kafka-go/sasl"
	"github.com/segmentio/kafka-go/sasl/plain"
	"github.com/segmentio/kafka-go/sasl/scram"
	"go.uber.org/zap"

	"freshet.dev/freshet/stream"
)

// Start says where a brand-new model (no checkpoint, no committed offset)
// starts reading a partition.
type Start uint8

const (
	// FirstOffset reads everything the topic still holds.
	FirstOffset Start = iota
	// LastOffset reads only records produced from now on.
	LastOffset
)

// Defaults for the zero fields of Options.
const (
	DefaultBatchSize         = 256
	DefaultMinBytes          = 1
	DefaultMaxBytes          = 1 << 20
	DefaultMaxWait           = 500 * time.Millisecond
	DefaultSessionTimeout    = 10 * time.Second
	DefaultQueueBatches      = 16
	DefaultPartitions        = 1
	DefaultReplicationFactor = 1
	DefaultDeadLetterQueue   = 4096
	// MinMaxWait is the shortest accepted Options.MaxWait: shorter waits with
	// large fetches gave spurious i/o timeouts, since kafka-go sets the read
	// deadline from it.
	MinMaxWait = 250 * time.Millisecond
)

// Security holds the connection security shared by readers and writers. The
// caller builds both; secrets never pass through this package's logs.
type Security struct {
	// TLS, when set, encrypts every connection to the brokers.
	TLS *tls.Config
	// SASL, when set, authenticates every connection (see SASL).
	SASL sasl.Mechanism
}

// SASL returns the kafka-go mechanism named by mechanism ("PLAIN",
// "SCRAM-SHA-256" or "SCRAM-SHA-512", any case) for user and pass.
func SASL(mechanism, user, pass string) (sasl.Mechanism, error) {
	if user == "" {
		return nil, errors.New("kafka: sasl: user is empty")
	}
	switch strings.ToUpper(mechanism) {
	case "PLAIN":
		return plain.Mechanism{Username: user, Password: pass}, nil
	case "SCRAM-SHA-256":
		return scram.Mechanism(scram.SHA256, user, pass)
	case "SCRAM-SHA-512":
		return scram.Mechanism(scram.SHA512, user, pass)
	}
	return nil, fmt.Errorf("kafka: sasl: unknown mechanism %q (want PLAIN, SCRAM-SHA-256 or SCRAM-SHA-512)", mechanism)
}

// Options configures a Source. Zero numeric fields take the defaults above.
type Options struct {
	// Brokers are the bootstrap addresses, host:port.
	Brokers []string
	// Topic is the events topic.
	Topic string
	// GroupID is the consumer group, one per model.
	GroupID string
	// DeadLetterTopic receives the records that fail to decode.
	DeadLetterTopic string
	// Start is where a brand-new model starts.
	Start Start
	// MinBytes, MaxBytes and MaxWait shape each fetch. MaxWait must be at
	// least MinMaxWait and at most 1 s (a worker checks for the end of its
	// generation between fetches).
	MinBytes int
	MaxBytes int
	MaxWait  time.Duration
	// SessionTimeout is the group session timeout. The broker must allow it
	// (group.min.session.timeout.ms, 6 s by default).
	SessionTimeout time.Duration
	// BatchSize is the most records (events and rejects) per Batch.
	BatchSize int
	// QueueBatches bounds the batches decoded ahead of the trainer.
	QueueBatches int
	// Partitions and ReplicationFactor are used when EnsureTopics creates a
	// topic.
	Partitions        int
	ReplicationFactor int
	// Security applies to every connection.
	Security Security
	// Decoder decodes one record value. Each worker uses its own decoder
	// from NewDecoder when set, else Decoder (then shared under a lock).
	Decoder    stream.Decoder
	NewDecoder func() stream.Decoder
	// Shared allows joining a group that already has active members (the
	// rebalance tests; scale-out later). Off, New refuses such a group.
	Shared bool
	// DeadLetterQueue bounds the records waiting for the dead-letter writer.
	DeadLetterQueue int
	// Logger receives assignment changes, commit failures and errors. Nil
	// means no logging.
	Logger *zap.Logger
}

// withDefaults returns o with its zero fields set, or an error naming the
// first invalid field.
func (o Options) withDefaults() (Options, error) {
	if len(o.Brokers) == 0 {
		return o, errors.New("kafka: options: brokers: none given")
	}
	for i, b := range o.Brokers {
		if b == "" || !strings.Contains(b, ":") {
			return o, fmt.Errorf("kafka: options: brokers[%d]: %q is not host:port", i, b)
		}
	}
	if o.Topic == "" {
		return o, errors.New("kafka: options: topic: empty")
	}
	if o.GroupID == "" {
		return o, errors.New("kafka: options: group id: empty")
	}
	if o.DeadLetterTopic == "" {
		return o, errors.New("kafka: options: dead-letter topic: empty")
	}
	if o.DeadLetterTopic == o.Topic {
		return o, fmt.Errorf("kafka: options: dead-letter topic: %q is the events topic", o.Topic)
	}
	if o.Start != FirstOffset && o.Start != LastOffset {
		return o, fmt.Errorf("kafka: options: start: unknown value %d", o.Start)
	}
	if o.Decoder == nil && o.NewDecoder == nil {
		return o, errors.New("kafka: options: decoder: none given")
	}
	def := func(name string, v *int, d int) error {
		if *v < 0 {
			return fmt.Errorf("kafka: options: %s: %d is negative", name, *v)
		}
		if *v == 0 {
			*v = d
		}
		return nil
	}
	for _, f := range []struct {
		name string
		v    *int
		d    int
	}{
		{"min bytes", &o.MinBytes, DefaultMinBytes},
		{"max bytes", &o.MaxBytes, DefaultMaxBytes},
		{"batch size", &o.BatchSize, DefaultBatchSize},
		{"queue batches", &o.QueueBatches, DefaultQueueBatches},
		{"partitions", &o.Partitions, DefaultPartitions},
		{"replication factor", &o.ReplicationFactor, DefaultReplicationFactor},
		{"dead-letter queue", &o.DeadLetterQueue, DefaultDeadLetterQueue},
	} {
		if err := def(f.name, f.v, f.d); err != nil {
			return o, err
		}
	}
	if o.MinBytes > o.MaxBytes {
		return o, fmt.Errorf("kafka: options: min bytes: %d exceeds max bytes %d", o.MinBytes, o.MaxBytes)
	}
	if o.MaxWait == 0 {
		o.MaxWait = DefaultMaxWait
	}
	if o.MaxWait < MinMaxWait || o.MaxWait > time.Second {
		return o, fmt.Errorf("kafka: options: max wait: %v is outside [%v, 1s]", o.MaxWait, MinMaxWait)
	}
	if o.SessionTimeout == 0 {
		o.SessionTimeout = DefaultSessionTimeout
	}
	if o.SessionTimeout < time.Second {
		return o, fmt.Errorf("kafka: options: session timeout: %v is below 1s", o.SessionTimeout)
	}
	if o.Logger == nil {
		o.Logger = zap.NewNop()
	}
	return o, nil
}

// dialer returns the kafka-go Dialer for readers and the group.
func (o *Options) dialer() *kgo.Dialer {
	return &kgo.Dialer{
		ClientID:      "freshet",
		Timeout:       10 * time.Second,
		DualStack:     true,
		TLS:           o.Security.TLS,
		SASLMechanism: o.Security.SASL,
	}
}

// transport returns the kafka-go Transport for writers and admin requests.
func (s Security) transport() *kgo.Transport {
	return &kgo.Transport{
		ClientID:    "freshet",
		DialTimeout: 10 * time.Second,
		IdleTimeout: 30 * time.Second,
		TLS:         s.TLS,
		SASL:        s.SASL,
	}
}
