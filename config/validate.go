package config

import (
	"errors"
	"fmt"
	"math"
	"net"
	"strconv"
	"strings"
	"time"
)

// checker collects validation problems.
type checker struct {
	o    *origin
	errs []error
}

// fail records a problem with the key at path, placed at path's location.
func (k *checker) fail(path, format string, args ...any) {
	k.failAt(path, path, format, args...)
}

// failAt records a problem with the key at path, placed at the location of the
// key at locPath (for a required key that is absent, the key that requires it).
func (k *checker) failAt(locPath, path, format string, args ...any) {
	e := k.o.locate(locPath, path+" "+fmt.Sprintf(format, args...))
	e.Path = path
	k.errs = append(k.errs, e)
}

func fmtFloat(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }

// float checks lo ⋖ v ⋖ hi, each end open or closed as said.
func (k *checker) float(path string, v, lo, hi float64, loOpen, hiOpen bool) {
	l, r := "[", "]"
	if loOpen {
		l = "("
	}
	if hiOpen {
		r = ")"
	}
	ok := !math.IsNaN(v) && !math.IsInf(v, 0) &&
		(v > lo || !loOpen && v == lo) && (v < hi || !hiOpen && v == hi)
	if !ok {
		k.fail(path, "must be in %s%s, %s%s, got %s", l, fmtFloat(lo), fmtFloat(hi), r, fmtFloat(v))
	}
}

// atLeast checks that v is a finite number ≥ lo.
func (k *checker) atLeast(path string, v, lo float64) {
	if math.IsNaN(v) || math.IsInf(v, 0) || v < lo {
		k.fail(path, "must be a finite number ≥ %s, got %s", fmtFloat(lo), fmtFloat(v))
	}
}

func (k *checker) intIn(path string, v, lo, hi int64) {
	if v < lo || v > hi {
		k.fail(path, "must be in [%d, %d], got %d", lo, hi, v)
	}
}

func (k *checker) durIn(path string, v, lo, hi time.Duration) {
	if v < lo || v > hi {
		k.fail(path, "must be in [%s, %s], got %s", lo, hi, v)
	}
}

// durOffOr checks v is 0 (off) or in [lo, hi].
func (k *checker) durOffOr(path string, v, lo, hi time.Duration) {
	if v != 0 && (v < lo || v > hi) {
		k.fail(path, "must be 0 (off) or in [%s, %s], got %s", lo, hi, v)
	}
}

func (k *checker) oneOf(path, v string, allowed ...string) {
	for _, a := range allowed {
		if v == a {
			return
		}
	}
	k.fail(path, "must be one of %s, got %q", strings.Join(allowed, ", "), v)
}

// hostPort checks s is host:port with a port in 0..65535 (0: any free port,
// for tests) when allowZero, 1..65535 otherwise.
func (k *checker) hostPort(path, s string, allowZero bool) {
	host, port, err := net.SplitHostPort(s)
	if err != nil {
		k.fail(path, "must be host:port, got %q", s)
		return
	}
	p, err := strconv.Atoi(port)
	lo := 1
	if allowZero {
		lo = 0
	}
	if err != nil || p < lo || p > 65535 {
		k.fail(path, "must have a port in %d..65535, got %q", lo, s)
		return
	}
	if strings.ContainsAny(host, " \t/") {
		k.fail(path, "must be host:port, got %q", s)
	}
}

// topicName checks a Kafka topic name: 1..249 characters of [a-zA-Z0-9._-],
// not "." or ".." (the broker's own rule, common practice).
func (k *checker) topicName(path, s string) {
	ok := s != "" && len(s) <= 249 && s != "." && s != ".."
	for _, r := range s {
		if !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '.' || r == '_' || r == '-') {
			ok = false
		}
	}
	if !ok {
		k.fail(path, "must be 1 to 249 characters of letters, digits, '.', '_' and '-', got %q", s)
	}
}

// Validate checks every key and every rule that ties keys together, and
// returns all problems joined (nil when there are none). Each message names
// the file and line (or the environment variable) when known, the key path
// and the bad value:
//
//	config: freshet.yaml:14: model.learn_rate must be in (0, 1], got 2.5
//
// Validate reads no files: it checks shape, not that paths exist. Settings of
// a section not in use (Kafka with another source kind, Redis when disabled)
// are still range-checked, but their required keys are not demanded.
func (c *Config) Validate() error {
	k := &checker{o: c.origin}

	if strings.TrimSpace(c.DataDir) == "" {
		k.fail("data_dir", "must not be empty")
	}

	m := &c.Model
	k.oneOf("model.mode", m.Mode, "explicit", "implicit")
	k.intIn("model.rank", int64(m.Rank), 1, 1024)
	k.float("model.learn_rate", m.LearnRate, 0, 1, true, false)
	k.float("model.bias_learn_rate", m.BiasLearnRate, 0, 1, false, false)
	k.float("model.reg", m.Reg, 0, 1, false, false)
	k.float("model.bias_reg", m.BiasReg, 0, 1, false, false)
	k.atLeast("model.rating_min", m.RatingMin, math.Inf(-1))
	k.atLeast("model.rating_max", m.RatingMax, math.Inf(-1))
	if !(m.RatingMin < m.RatingMax) && !math.IsInf(m.RatingMin, 0) && !math.IsInf(m.RatingMax, 0) {
		k.fail("model.rating_max", "must be greater than model.rating_min (%s), got %s", fmtFloat(m.RatingMin), fmtFloat(m.RatingMax))
	}
	k.float("model.init_std", m.InitStd, 0, 1, true, false)
	k.float("model.decay", m.Decay, 0, 1, false, false)
	k.float("model.decay_floor", m.DecayFloor, 0, 1, true, false)
	k.atLeast("model.error_clip", m.ErrorClip, 0)
	k.intIn("model.negatives", int64(m.Negatives), 0, 100)
	if m.Pairwise && m.Mode == "explicit" {
		k.fail("model.pairwise", "needs model.mode implicit, got pairwise true with mode %q", m.Mode)
	}
	if m.Pairwise && m.Negatives < 1 {
		k.fail("model.negatives", "must be at least 1 when model.pairwise is true (BPR pairs each positive with a negative), got %d", m.Negatives)
	}
	k.intIn("model.max_users", int64(m.MaxUsers), 0, math.MaxInt32)
	k.intIn("model.max_items", int64(m.MaxItems), 0, math.MaxInt32)

	mo := &c.Monitor
	k.float("monitor.fading", mo.Fading, 0, 1, true, true)
	k.intIn("monitor.window", int64(mo.Window), 1, 10_000_000)
	k.atLeast("monitor.page_hinkley.delta", mo.PageHinkley.Delta, 0)
	k.float("monitor.page_hinkley.lambda", mo.PageHinkley.Lambda, 0, math.MaxFloat64, true, false)
	k.intIn("monitor.page_hinkley.min_samples", int64(mo.PageHinkley.MinSamples), 1, math.MaxInt32)
	k.float("monitor.adwin.delta", mo.ADWIN.Delta, 0, 1, true, true)
	k.intIn("monitor.recall_top_n", int64(mo.RecallTopN), 1, 1000)
	k.intIn("monitor.recall_rate", int64(mo.RecallRate), 0, 100_000)
	k.durOffOr("monitor.progress_interval", mo.ProgressInterval, 100*time.Millisecond, 24*time.Hour)

	s := &c.Source
	k.oneOf("source.kind", s.Kind, "scenario", "file", "kafka")
	k.intIn("source.batch_size", int64(s.BatchSize), 1, 100_000)
	sc := &s.Scenario
	k.intIn("source.scenario.listeners", int64(sc.Listeners), 1, math.MaxInt32)
	k.intIn("source.scenario.shows", int64(sc.Shows), 1, math.MaxInt32)
	k.intIn("source.scenario.communities", int64(sc.Communities), 1, 10_000)
	if sc.Communities > sc.Listeners || sc.Communities > sc.Shows {
		k.fail("source.scenario.communities", "must not exceed source.scenario.listeners (%d) or source.scenario.shows (%d), got %d", sc.Listeners, sc.Shows, sc.Communities)
	}
	k.intIn("source.scenario.rank", int64(sc.Rank), 1, 1024)
	k.atLeast("source.scenario.noise", sc.Noise, 0)
	k.intIn("source.scenario.events", sc.Events, 0, math.MaxInt64)
	k.intIn("source.scenario.shift_at", sc.ShiftAt, 0, math.MaxInt64)
	if sc.Events > 0 && sc.ShiftAt >= sc.Events {
		k.fail("source.scenario.shift_at", "must be 0 (no shift) or below source.scenario.events (%d), got %d", sc.Events, sc.ShiftAt)
	}
	k.atLeast("source.scenario.rate", sc.Rate, 0)
	k.oneOf("source.file.format", s.File.Format, "auto", "jsonl", "csv", "tsv")
	if s.Kind == "file" && strings.TrimSpace(s.File.Path) == "" {
		k.failAt("source.kind", "source.file.path", "is required when source.kind is file")
	}

	c.validateKafka(k)

	cp := &c.Checkpoint
	k.durIn("checkpoint.flush_interval", cp.FlushInterval, 10*time.Millisecond, time.Hour)
	k.intIn("checkpoint.flush_rows", int64(cp.FlushRows), 1, math.MaxInt32)
	k.durIn("checkpoint.snapshot_interval", cp.SnapshotInterval, time.Second, 7*24*time.Hour)
	k.intIn("checkpoint.keep_snapshots", int64(cp.KeepSnapshots), 1, 1000)

	c.validateRedis(k)

	k.oneOf("log.level", c.Log.Level, "debug", "info", "warn", "error")
	k.oneOf("log.format", c.Log.Format, "auto", "json", "console")
	if c.HTTP.Listen != "" {
		k.hostPort("http.listen", c.HTTP.Listen, true)
	}
	return errors.Join(k.errs...)
}

func (c *Config) validateKafka(k *checker) {
	kf := &c.Kafka
	used := c.Source.Kind == "kafka"
	if used && len(kf.Brokers) == 0 {
		k.failAt("source.kind", "kafka.brokers", "is required when source.kind is kafka")
	}
	for i, b := range kf.Brokers {
		k.hostPort(fmt.Sprintf("kafka.brokers[%d]", i), b, false)
	}
	if used && kf.Topic == "" {
		k.failAt("source.kind", "kafka.topic", "is required when source.kind is kafka")
	} else if kf.Topic != "" {
		k.topicName("kafka.topic", kf.Topic)
	}
	if used && strings.TrimSpace(kf.Group) == "" {
		k.fail("kafka.group", "must not be empty when source.kind is kafka")
	}
	if kf.DeadLetterTopic != "" {
		k.topicName("kafka.dead_letter_topic", kf.DeadLetterTopic)
		if kf.DeadLetterTopic == kf.Topic {
			k.fail("kafka.dead_letter_topic", "must differ from kafka.topic, got %q for both", kf.Topic)
		}
	}
	k.oneOf("kafka.start", kf.Start, "earliest", "latest")
	k.intIn("kafka.min_bytes", int64(kf.MinBytes), 1, 1<<30)
	k.intIn("kafka.max_bytes", int64(kf.MaxBytes), 1, 1<<30)
	if kf.MaxBytes < kf.MinBytes {
		k.fail("kafka.max_bytes", "must be at least kafka.min_bytes (%d), got %d", kf.MinBytes, kf.MaxBytes)
	}
	// Below 250ms large fetches time out spuriously (the client derives its
	// read deadline from max_wait); above 1s an idle source cannot return its
	// empty batch once per second as stream.Source requires.
	k.durIn("kafka.max_wait", kf.MaxWait, 250*time.Millisecond, time.Second)
	k.durIn("kafka.session_timeout", kf.SessionTimeout, time.Second, 30*time.Minute)
	k.intIn("kafka.partitions", int64(kf.Partitions), 1, 100_000)
	k.intIn("kafka.replication", int64(kf.Replication), 1, 32)
	c.validateTLS(k, "kafka.tls", &kf.TLS)

	sa := &kf.SASL
	k.oneOf("kafka.sasl.mechanism", sa.Mechanism, "", "plain", "scram-sha-256", "scram-sha-512")
	if sa.PasswordFile != "" && sa.PasswordEnv != "" {
		k.fail("kafka.sasl.password_env", "must not be set together with kafka.sasl.password_file (choose one), got %q and %q", sa.PasswordEnv, sa.PasswordFile)
	}
	if sa.Mechanism != "" {
		if sa.Username == "" {
			k.failAt("kafka.sasl.mechanism", "kafka.sasl.username", "is required when kafka.sasl.mechanism is %q", sa.Mechanism)
		}
		if sa.PasswordFile == "" && sa.PasswordEnv == "" {
			k.failAt("kafka.sasl.mechanism", "kafka.sasl.password_file", "or kafka.sasl.password_env is required when kafka.sasl.mechanism is %q", sa.Mechanism)
		}
	} else if sa.Username != "" || sa.PasswordFile != "" || sa.PasswordEnv != "" {
		k.failAt("kafka.sasl.username", "kafka.sasl.mechanism", "is required when SASL credentials are given, got \"\"")
	}
	if sa.PasswordEnv != "" {
		k.envName("kafka.sasl.password_env", sa.PasswordEnv)
	}
}

// envName checks that v can name an environment variable.
func (k *checker) envName(path, v string) {
	if strings.ContainsAny(v, "= \t\n") {
		k.fail(path, "must be an environment variable name, got %q", v)
	}
}

func (c *Config) validateTLS(k *checker, path string, t *TLS) {
	if (t.CertFile == "") != (t.KeyFile == "") {
		k.fail(path+".key_file", "and %s.cert_file must be given together, got key_file %q and cert_file %q", path, t.KeyFile, t.CertFile)
	}
	if !t.Enabled {
		set := map[string]bool{
			"ca_file": t.CAFile != "", "cert_file": t.CertFile != "", "key_file": t.KeyFile != "",
			"server_name": t.ServerName != "", "insecure_skip_verify": t.InsecureSkipVerify,
		}
		for _, name := range []string{"ca_file", "cert_file", "key_file", "server_name", "insecure_skip_verify"} {
			if set[name] {
				k.fail(path+"."+name, "is set but %s.enabled is false; enable TLS or remove it", path)
			}
		}
	}
}

func (c *Config) validateRedis(k *checker) {
	r := &c.Redis
	if r.Enabled && len(r.Addrs) == 0 {
		k.failAt("redis.enabled", "redis.addrs", "is required when redis.enabled is true")
	}
	for i, a := range r.Addrs {
		k.hostPort(fmt.Sprintf("redis.addrs[%d]", i), a, false)
	}
	k.intIn("redis.db", int64(r.DB), 0, 1<<20)
	if len(r.Addrs) > 1 && r.DB != 0 {
		k.fail("redis.db", "must be 0 with several redis.addrs (a cluster has only database 0), got %d", r.DB)
	}
	if r.PasswordFile != "" && r.PasswordEnv != "" {
		k.fail("redis.password_env", "must not be set together with redis.password_file (choose one), got %q and %q", r.PasswordEnv, r.PasswordFile)
	}
	if r.PasswordEnv != "" {
		k.envName("redis.password_env", r.PasswordEnv)
	}
	c.validateTLS(k, "redis.tls", &r.TLS)
	switch {
	case r.Prefix == "":
		k.fail("redis.prefix", "must not be empty")
	case len(r.Prefix) > 64 || strings.ContainsAny(r.Prefix, " \t\r\n{}"):
		// Braces would make a hash tag and pin keys to one cluster slot.
		k.fail("redis.prefix", "must be at most 64 characters without blanks or braces, got %q", r.Prefix)
	}
	k.durIn("redis.flush_interval", r.FlushInterval, 10*time.Millisecond, time.Hour)
	k.intIn("redis.flush_rows", int64(r.FlushRows), 1, math.MaxInt32)
	k.durIn("redis.grace", r.Grace, 0, 7*24*time.Hour)
	k.durIn("redis.write_timeout", r.WriteTimeout, time.Millisecond, 10*time.Minute)
}

// Warnings returns settings that are valid but risky, one sentence each, for
// the caller to log at startup.
func (c *Config) Warnings() []string {
	var w []string
	kafka := c.Source.Kind == "kafka"
	if kafka && c.Kafka.TLS.InsecureSkipVerify {
		w = append(w, "kafka.tls.insecure_skip_verify is true: the broker's certificate is not checked")
	}
	if kafka && c.Kafka.SASL.Mechanism == "plain" && !c.Kafka.TLS.Enabled {
		w = append(w, "kafka.sasl.mechanism is plain without kafka.tls.enabled: the password crosses the network in clear")
	}
	if c.Redis.Enabled && c.Redis.TLS.InsecureSkipVerify {
		w = append(w, "redis.tls.insecure_skip_verify is true: the server's certificate is not checked")
	}
	if c.Redis.Enabled && (c.Redis.PasswordFile != "" || c.Redis.PasswordEnv != "") && !c.Redis.TLS.Enabled {
		w = append(w, "redis has a password but redis.tls.enabled is false: the password crosses the network in clear")
	}
	if kafka && c.Kafka.SessionTimeout < 6*time.Second {
		w = append(w, "kafka.session_timeout is below 6s, the broker's default group.min.session.timeout.ms: the group join will fail unless the broker allows it")
	}
	return w
}
