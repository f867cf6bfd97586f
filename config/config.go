package config

import "time"

// Config is freshet's whole configuration. Obtain one with Default, Load or
// Parse; the zero Config is not valid.
type Config struct {
	// DataDir holds checkpoints, snapshots and the rejects file. The
	// command-line flag -data, when given, overrides it.
	DataDir    string     `yaml:"data_dir"`
	Model      Model      `yaml:"model"`
	Monitor    Monitor    `yaml:"monitor"`
	Source     Source     `yaml:"source"`
	Kafka      Kafka      `yaml:"kafka"`
	Checkpoint Checkpoint `yaml:"checkpoint"`
	Redis      Redis      `yaml:"redis"`
	Log        Log        `yaml:"log"`
	HTTP       HTTP       `yaml:"http"`

	// origin records where each key was set (file line or environment
	// variable), so that Validate can point at it. nil for Default().
	origin *origin
}

// Model configures the latent-factor model and its SGD steps.
type Model struct {
	// Mode is "explicit" (ratings, biased MF) or "implicit" (positive-only).
	Mode string `yaml:"mode"`
	// Rank is the number of latent factors k, 1..1024.
	Rank int `yaml:"rank"`
	// LearnRate is the SGD step γ for factor vectors, in (0, 1].
	LearnRate float64 `yaml:"learn_rate"`
	// BiasLearnRate is the SGD step for the user and item biases, in [0, 1]
	// (0 keeps the biases at zero).
	BiasLearnRate float64 `yaml:"bias_learn_rate"`
	// Reg is the L2 penalty λ on factor vectors, in [0, 1].
	Reg float64 `yaml:"reg"`
	// BiasReg is the L2 penalty on biases, in [0, 1].
	BiasReg float64 `yaml:"bias_reg"`
	// RatingMin and RatingMax bound the rating scale (explicit mode):
	// predictions are clamped to it and values outside it are rejected.
	RatingMin float64 `yaml:"rating_min"`
	RatingMax float64 `yaml:"rating_max"`
	// InitStd is the standard deviation of the Gaussian that new rows are
	// drawn from, in (0, 1].
	InitStd float64 `yaml:"init_std"`
	// Decay is the per-row step-size decay rate, in [0, 1]; 0 keeps the step
	// constant. A row's step shrinks as it receives updates.
	Decay float64 `yaml:"decay"`
	// DecayFloor is the smallest fraction of LearnRate a decayed step may
	// reach, in (0, 1].
	DecayFloor float64 `yaml:"decay_floor"`
	// ErrorClip bounds |e| in each step; 0 means no clipping.
	ErrorClip float64 `yaml:"error_clip"`
	// Negatives is the number of sampled negative items per positive event
	// (implicit mode), 0..100.
	Negatives int `yaml:"negatives"`
	// Pairwise selects the BPR pairwise step instead of pointwise targets
	// (implicit mode only; needs Negatives ≥ 1).
	Pairwise bool `yaml:"pairwise"`
	// MaxUsers and MaxItems cap the rows per side; 0 means no cap.
	MaxUsers int `yaml:"max_users"`
	MaxItems int `yaml:"max_items"`
	// Seed seeds row initialisation and negative sampling.
	Seed uint64 `yaml:"seed"`
}

// Monitor configures prequential error measurement and drift detection.
type Monitor struct {
	// Fading is the fading factor α of the faded prequential error, in (0, 1).
	Fading float64 `yaml:"fading"`
	// Window is the length of the sliding prequential window, in events.
	Window      int         `yaml:"window"`
	PageHinkley PageHinkley `yaml:"page_hinkley"`
	ADWIN       ADWIN       `yaml:"adwin"`
	// RecallTopN is N in prequential recall@N (implicit mode), 1..1000.
	RecallTopN int `yaml:"recall_top_n"`
	// RecallRate caps recall@N evaluations per second (each scores every
	// item); 0 turns recall evaluation off.
	RecallRate int `yaml:"recall_rate"`
	// ProgressInterval is the period of the progress log line; 0 turns it off.
	ProgressInterval time.Duration `yaml:"progress_interval"`
}

// PageHinkley configures the Page-Hinkley test on the normalised error stream.
type PageHinkley struct {
	// Delta is the magnitude of change tolerated, δ ≥ 0.
	Delta float64 `yaml:"delta"`
	// Lambda is the alarm threshold λ > 0.
	Lambda float64 `yaml:"lambda"`
	// MinSamples is the number of samples before an alarm may fire, ≥ 1.
	MinSamples int `yaml:"min_samples"`
}

// ADWIN configures the adaptive-window change detector (Bifet and Gavaldà, 2007).
type ADWIN struct {
	Enabled bool `yaml:"enabled"`
	// Delta is the confidence parameter δ, in (0, 1).
	Delta float64 `yaml:"delta"`
}

// Source selects and configures where events come from. The Kafka settings
// live in their own top-level section, Config.Kafka.
type Source struct {
	// Kind is "scenario" (built-in demo), "file" (replay) or "kafka".
	Kind string `yaml:"kind"`
	// BatchSize is the most events handed to the trainer at once, 1..100000.
	BatchSize int      `yaml:"batch_size"`
	Scenario  Scenario `yaml:"scenario"`
	File      File     `yaml:"file"`
}

// Scenario configures the built-in demo: a fictional podcast app whose
// listeners rate (explicit mode) or play (implicit mode) shows, generated from
// a planted low-rank model with community structure.
type Scenario struct {
	Seed        uint64 `yaml:"seed"`
	Listeners   int    `yaml:"listeners"`
	Shows       int    `yaml:"shows"`
	Communities int    `yaml:"communities"`
	// Rank is the rank of the planted model, 1..1024.
	Rank int `yaml:"rank"`
	// Noise is the standard deviation σ of the Gaussian noise on ratings.
	Noise float64 `yaml:"noise"`
	// Events is the number of events to generate; 0 means endless.
	Events int64 `yaml:"events"`
	// ShiftAt is the index of the event at which tastes shift; 0 means never.
	ShiftAt int64 `yaml:"shift_at"`
	// Rate is the pace in events per second; 0 means as fast as possible.
	Rate float64 `yaml:"rate"`
}

// File configures replay from a file of records.
type File struct {
	Path string `yaml:"path"`
	// Format is "jsonl", "csv", "tsv" or "auto" (by extension, then content).
	Format string `yaml:"format"`
	// Follow keeps reading as the file grows instead of ending at EOF.
	Follow bool `yaml:"follow"`
}

// Kafka configures the Kafka consumer (source.kind: kafka) and the
// dead-letter writer.
type Kafka struct {
	// Brokers are the bootstrap addresses, host:port.
	Brokers []string `yaml:"brokers"`
	Topic   string   `yaml:"topic"`
	Group   string   `yaml:"group"`
	// DeadLetterTopic receives rejected records with their reasons; "" means
	// the events topic's name followed by ".rejects".
	DeadLetterTopic string `yaml:"dead_letter_topic"`
	// Start is where a model with no checkpoint starts reading when the group
	// has no committed offset: "earliest" or "latest".
	Start    string `yaml:"start"`
	MinBytes int    `yaml:"min_bytes"`
	MaxBytes int    `yaml:"max_bytes"`
	// MaxWait is the longest a fetch waits for MinBytes, in [250ms, 1s]:
	// below 250ms large fetches time out spuriously (the client sets its read
	// deadline from it), and above 1s an idle source could not hand the
	// trainer its empty batch once per second.
	MaxWait time.Duration `yaml:"max_wait"`
	// SessionTimeout is the consumer-group session timeout, in [1s, 30m]. The
	// broker refuses values below its group.min.session.timeout.ms (6s by
	// default).
	SessionTimeout time.Duration `yaml:"session_timeout"`
	// CreateTopics creates missing topics with Partitions and Replication.
	CreateTopics bool `yaml:"create_topics"`
	Partitions   int  `yaml:"partitions"`
	Replication  int  `yaml:"replication"`
	TLS          TLS  `yaml:"tls"`
	SASL         SASL `yaml:"sasl"`
}

// TLS configures a client TLS connection. File paths are relative to the
// working directory.
type TLS struct {
	Enabled bool `yaml:"enabled"`
	// CAFile is a PEM bundle of roots; "" uses the system roots.
	CAFile string `yaml:"ca_file"`
	// CertFile and KeyFile are the client certificate and key (both or neither).
	CertFile   string `yaml:"cert_file"`
	KeyFile    string `yaml:"key_file"`
	ServerName string `yaml:"server_name"`
	// InsecureSkipVerify turns off server certificate checks (tests only).
	InsecureSkipVerify bool `yaml:"insecure_skip_verify"`
}

// SASL configures Kafka SASL authentication.
type SASL struct {
	// Mechanism is "" (none), "plain", "scram-sha-256" or "scram-sha-512".
	Mechanism string `yaml:"mechanism"`
	Username  string `yaml:"username"`
	// PasswordFile names a file holding the password (one trailing newline is
	// dropped); PasswordEnv names an environment variable holding it. Exactly
	// one is required when Mechanism is set.
	PasswordFile string `yaml:"password_file"`
	PasswordEnv  string `yaml:"password_env"`
	// Password is filled by ResolveSecrets; it is never read from or written
	// to YAML.
	Password Secret `yaml:"-"`
}

// Checkpoint configures the durable local checkpoints under DataDir.
type Checkpoint struct {
	// FlushInterval is the longest time between incremental flushes.
	FlushInterval time.Duration `yaml:"flush_interval"`
	// FlushRows forces a flush once this many rows are dirty.
	FlushRows int `yaml:"flush_rows"`
	// SnapshotInterval is the period of full snapshots.
	SnapshotInterval time.Duration `yaml:"snapshot_interval"`
	// KeepSnapshots is how many full snapshots to keep, 1..1000.
	KeepSnapshots int `yaml:"keep_snapshots"`
}

// Redis configures the serving copy of the factors.
type Redis struct {
	Enabled bool `yaml:"enabled"`
	// Addrs are host:port addresses; more than one means a cluster.
	Addrs    []string `yaml:"addrs"`
	DB       int      `yaml:"db"`
	Username string   `yaml:"username"`
	// PasswordFile or PasswordEnv (at most one) supply the password.
	PasswordFile string `yaml:"password_file"`
	PasswordEnv  string `yaml:"password_env"`
	// Password is filled by ResolveSecrets; never read from or written to YAML.
	Password Secret `yaml:"-"`
	TLS      TLS    `yaml:"tls"`
	// Prefix starts every key freshet writes; it separates deployments.
	Prefix        string        `yaml:"prefix"`
	FlushInterval time.Duration `yaml:"flush_interval"`
	FlushRows     int           `yaml:"flush_rows"`
	// Grace is how long an old model version stays readable after a newer
	// one is published.
	Grace        time.Duration `yaml:"grace"`
	WriteTimeout time.Duration `yaml:"write_timeout"`
}

// Log configures the process logger.
type Log struct {
	// Level is "debug", "info", "warn" or "error".
	Level string `yaml:"level"`
	// Format is "json", "console" or "auto" (console on a terminal, else json).
	Format string `yaml:"format"`
}

// HTTP configures the metrics and health endpoint.
type HTTP struct {
	// Listen is the host:port to serve on; "" turns the endpoint off.
	Listen string `yaml:"listen"`
}

// Default returns the configuration that runs the built-in demo with no file
// and no environment: scenario source, explicit mode, data in ./data, no
// Kafka, no Redis, no HTTP endpoint.
func Default() *Config {
	return &Config{
		DataDir: "./data",
		Model: Model{
			Mode:          "explicit",
			Rank:          32,
			LearnRate:     0.01,
			BiasLearnRate: 0.01,
			Reg:           0.02,
			BiasReg:       0.02,
			RatingMin:     1,
			RatingMax:     5,
			InitStd:       0.1,
			Decay:         0,
			DecayFloor:    0.1,
			ErrorClip:     0,
			Negatives:     3,
			Pairwise:      false,
			MaxUsers:      0,
			MaxItems:      0,
			Seed:          1,
		},
		Monitor: Monitor{
			Fading:           0.999,
			Window:           10000,
			PageHinkley:      PageHinkley{Delta: 0.005, Lambda: 50, MinSamples: 30},
			ADWIN:            ADWIN{Enabled: true, Delta: 0.002},
			RecallTopN:       10,
			RecallRate:       50,
			ProgressInterval: 5 * time.Second,
		},
		Source: Source{
			Kind:      "scenario",
			BatchSize: 256,
			Scenario: Scenario{
				Seed:        1,
				Listeners:   20000,
				Shows:       2000,
				Communities: 8,
				Rank:        8,
				Noise:       0.3,
				Events:      0,
				ShiftAt:     1000000,
				Rate:        20000,
			},
			File: File{Format: "auto"},
		},
		Kafka: Kafka{
			Group:          "freshet",
			Start:          "earliest",
			MinBytes:       1,
			MaxBytes:       10 << 20,
			MaxWait:        500 * time.Millisecond,
			SessionTimeout: 10 * time.Second,
			Partitions:     1,
			Replication:    1,
		},
		Checkpoint: Checkpoint{
			FlushInterval:    time.Second,
			FlushRows:        50000,
			SnapshotInterval: 5 * time.Minute,
			KeepSnapshots:    1,
		},
		Redis: Redis{
			Addrs:         []string{"127.0.0.1:6379"},
			Prefix:        "freshet",
			FlushInterval: time.Second,
			FlushRows:     50000,
			Grace:         10 * time.Minute,
			WriteTimeout:  5 * time.Second,
		},
		Log:  Log{Level: "info", Format: "auto"},
		HTTP: HTTP{Listen: ""},
	}
}
