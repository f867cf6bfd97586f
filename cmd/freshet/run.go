package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"path/filepath"
	"syscall"
	"time"

	"go.uber.org/zap"

	"freshet.dev/freshet/config"
	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/checkpoint"
	"freshet.dev/freshet/sink/serving"
	"freshet.dev/freshet/stream"
)

const usage = `freshet keeps user and item latent-factor vectors fresh from a stream of interactions.

Usage:
  freshet run      [-config FILE] [-data DIR] [-check]    run the daemon (no flags: the built-in demo)
  freshet replay   -file FILE [-config FILE] [-curve OUT.csv] [-every N]
                                                         evaluate a file offline, test-then-train
  freshet generate [-config FILE] [-events N] [-o FILE]   write the demo scenario as JSON lines
  freshet feed     [-config FILE] [-file F] [-rate R] [-events N] [-for D]
                                                         send the demo (or a file) to the Kafka topic
  freshet show     -user ID [-n 10] [-candidates all|ID,...] [-config FILE]   a user's vector and top-N from Redis
  freshet erase    (-user ID | -item ID) [-file F] [-config FILE]   send an erasure event (Kafka, or append to F)

Run 'freshet COMMAND -h' for a command's flags.
`

// run dispatches a subcommand. It is main without the process: tests call it.
func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) == 0 {
		fmt.Fprint(stderr, usage)
		return usagef("no command given")
	}
	cmd, rest := args[0], args[1:]
	switch cmd {
	case "run":
		return runDaemon(ctx, rest, stdout, stderr)
	case "replay":
		return runReplay(ctx, rest, stdout, stderr)
	case "generate":
		return runGenerate(ctx, rest, stdout, stderr)
	case "feed":
		return runFeed(ctx, rest, stdout, stderr)
	case "show":
		return runShow(ctx, rest, stdout, stderr)
	case "erase":
		return runErase(ctx, rest, stdout, stderr)
	case "-h", "-help", "--help", "help":
		fmt.Fprint(stdout, usage)
		return nil
	}
	fmt.Fprint(stderr, usage)
	return usagef("unknown command %q", cmd)
}

// parseFlags parses fs, mapping -h to errHelp and other mistakes to usage
// errors.
func parseFlags(fs *flag.FlagSet, args []string) error {
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return errHelp
		}
		return asUsage(err)
	}
	if fs.NArg() > 0 {
		return usagef("%s: unexpected argument %q", fs.Name(), fs.Arg(0))
	}
	return nil
}

// loadConfig loads the file (or the defaults) with the environment
// overrides, applies the -data flag and reads the secrets in use.
func loadConfig(path, dataDir string) (*config.Config, error) {
	cfg, err := config.Load(path)
	if err != nil {
		return nil, asUsage(err)
	}
	if dataDir != "" {
		cfg.DataDir = dataDir
	}
	if err := cfg.ResolveSecrets(os.LookupEnv); err != nil {
		return nil, asUsage(err)
	}
	return cfg, nil
}

func runDaemon(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("run", flag.ContinueOnError)
	fs.SetOutput(stderr)
	cfgPath := fs.String("config", "", "configuration `file` (YAML); none: the built-in demo")
	dataDir := fs.String("data", "", "data `directory` for checkpoints and rejects (overrides data_dir)")
	check := fs.Bool("check", false, "load and validate the configuration, print it, and exit")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	cfg, err := loadConfig(*cfgPath, *dataDir)
	if err != nil {
		return err
	}
	if *check {
		fmt.Fprint(stdout, cfg.Dump())
		for _, w := range cfg.Warnings() {
			fmt.Fprintln(stderr, "warning:", w)
		}
		return nil
	}
	log, _, err := newLogger(stderr, cfg.Log.Level, cfg.Log.Format)
	if err != nil {
		return err
	}
	defer log.Sync() //nolint:errcheck // nothing to do about a failed log sync at exit
	for _, w := range cfg.Warnings() {
		log.Warn("config", zap.String("warning", w))
	}

	// Signals: the first SIGINT or SIGTERM starts the drain; a second one
	// during the drain exits at once (the last durable cut is safe).
	ctx, stop := signal.NotifyContext(ctx, os.Interrupt, syscall.SIGTERM)
	defer stop()
	go func() {
		<-ctx.Done()
		stop() // restore default handling: the next signal kills
	}()

	d, err := openDaemon(ctx, cfg, log)
	if err != nil {
		return err
	}
	if cfg.HTTP.Listen != "" {
		// The HTTP server stops last, so the final state can be scraped
		// during the drain (deferred calls run in reverse).
		_, stopHTTP, err := serveHTTP(cfg.HTTP.Listen, d, log.Named("http"))
		if err != nil {
			d.close()
			return err
		}
		defer stopHTTP()
	}
	defer d.close()
	log.Info("started", zap.String("data", cfg.DataDir), zap.String("source", cfg.Source.Kind),
		zap.String("mode", cfg.Model.Mode), zap.Int("rank", cfg.Model.Rank))
	if err := d.trainer.Run(ctx); err != nil {
		log.Error("stopped on error", zap.Error(err))
		return err
	}
	return nil
}

// daemon is the wired pipeline: source -> trainer (model, monitor) ->
// checkpoint store.
type daemon struct {
	writer  *serving.Writer
	store   *checkpoint.Store
	rejects *stream.RejectFile
	source  stream.Source
	trainer *online.Trainer
	model   *online.Model
	monitor *online.Monitor
}

func (d *daemon) close() {
	if d.writer != nil {
		// The trainer handed over its last rows; give Redis a bounded
		// time to take them (they are in the local checkpoint anyway).
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		d.writer.Close(ctx)
		cancel()
	}
	if d.source != nil {
		d.source.Close()
	}
	if d.rejects != nil {
		d.rejects.Close()
	}
	if d.store != nil {
		d.store.Close()
	}
}

// openDaemon opens the data directory, recovers the newest durable state,
// and builds the source at the recovered position.
func openDaemon(ctx context.Context, cfg *config.Config, log *zap.Logger) (_ *daemon, err error) {
	d := &daemon{}
	defer func() {
		if err != nil {
			d.close()
		}
	}()
	if d.model, d.monitor, err = newModel(cfg); err != nil {
		return nil, err
	}
	d.store, err = checkpoint.Open(checkpoint.Options{Dir: cfg.DataDir, Keep: cfg.Checkpoint.KeepSnapshots, Logger: log.Named("checkpoint")})
	if err != nil {
		return nil, fmt.Errorf("open data directory: %w", err)
	}
	resume, reapply, err := recoverState(d.store, d.model, d.monitor, log)
	if err != nil {
		return nil, err
	}
	var so serving.Options
	if cfg.Redis.Enabled {
		if so, err = servingOptions(cfg, d.model.Options().Mode, log.Named("redis")); err != nil {
			return nil, err
		}
		if resume == nil {
			// No local checkpoint: a new machine may restore from the
			// serving copy and resume from the position it reflects.
			rctx, cancel := context.WithTimeout(ctx, 5*time.Minute)
			resume, so.Adopt, err = restoreFromRedis(rctx, so, d.store, d.model, d.monitor, log)
			cancel()
			if err != nil {
				return nil, err
			}
		}
	}
	if d.rejects, err = stream.OpenRejectFile(filepath.Join(cfg.DataDir, "rejects.jsonl")); err != nil {
		return nil, err
	}
	from := stream.Position{}
	if resume != nil {
		from = resume.Position
	}
	if cfg.Source.Kind == "kafka" {
		d.source, err = newKafkaSource(ctx, cfg, from, log)
	} else {
		d.source, err = newSource(cfg, from, d.rejects)
	}
	if err != nil {
		return nil, err
	}
	to := trainerOptions(cfg)
	to.Model, to.Monitor, to.Source, to.Checkpoint = d.model, d.monitor, d.source, d.store
	to.Resume, to.Reapply, to.Logger = resume, reapply, log.Named("trainer")
	rejects := d.rejects
	to.OnErase = func(_ online.Side, id []byte) error {
		_, err := rejects.RemoveID(id)
		return err
	}
	if cfg.Source.Kind == "scenario" {
		to.MaxRate = cfg.Source.Scenario.Rate
	}
	if cfg.Redis.Enabled {
		so.OnChange = func(st serving.Status) {
			log.Info("redis status", zap.Bool("degraded", st.Degraded), zap.Uint64("version", st.Version),
				zap.Int("pending", st.Pending), zap.String("error", st.LastError))
		}
		if d.writer, err = serving.New(so); err != nil {
			return nil, asUsage(err)
		}
		to.Publisher = d.writer
		to.ProgressFields = servingFields(d.writer)
	}
	if d.trainer, err = online.NewTrainer(to); err != nil {
		return nil, err
	}
	return d, nil
}

// recoverState loads the newest durable cut into model and monitor and
// returns its meta (nil for a new model) and the number of events the
// previous process applied beyond it, which will be applied again.
func recoverState(store *checkpoint.Store, m *online.Model, mon *online.Monitor, log *zap.Logger) (*online.Meta, uint64, error) {
	// The rows come before the meta that names the rank: a row of another
	// rank is the same configuration mistake as the rank check below, not
	// a damaged file.
	heldRank := 0
	apply := func(rec *online.RowRecord) error {
		if !rec.Deleted && len(rec.Vec) != m.Rank() {
			heldRank = len(rec.Vec)
			return errors.New("rank mismatch")
		}
		return m.ApplyRecord(rec)
	}
	meta, info, err := store.Recover(apply)
	if err != nil {
		if heldRank != 0 {
			return nil, 0, usagef("data directory holds a model of rank %d; the configuration asks for rank %d (use another data directory)",
				heldRank, m.Rank())
		}
		return nil, 0, fmt.Errorf("recover checkpoint: %w", err)
	}
	if info.TornBytes > 0 {
		log.Warn("dropped torn log tail", zap.String("file", info.TornFile),
			zap.Int64("offset", info.TornOffset), zap.Int64("bytes", info.TornBytes))
	}
	for _, sa := range info.SetAside {
		log.Warn("snapshot failed its checksum; set aside", zap.Any("snapshot", sa))
	}
	if info.Reapply > 0 {
		log.Warn("the previous process stopped without a final cut; events after the recovered position are applied again",
			zap.Uint64("reapply", info.Reapply))
	}
	if meta == nil {
		return nil, info.Reapply, nil
	}
	if meta.Rank != m.Rank() || meta.Mode != m.Options().Mode.String() {
		return nil, 0, usagef("data directory holds an %s model of rank %d; the configuration asks for %s rank %d (use another data directory)",
			meta.Mode, meta.Rank, m.Options().Mode, m.Rank())
	}
	if err := m.Restore(meta.Model); err != nil {
		return nil, 0, fmt.Errorf("restore model: %w", err)
	}
	if len(meta.Monitor) > 0 {
		if err := mon.UnmarshalState(meta.Monitor); err != nil {
			return nil, 0, fmt.Errorf("restore monitor: %w", err)
		}
	}
	log.Info("recovered", zap.String("snapshot", info.Snapshot), zap.Int("snapshot_rows", info.SnapshotRows),
		zap.Strings("logs", info.Logs), zap.Int("records", info.Records), zap.Int("log_rows", info.LogRows),
		zap.Uint64("reapply", info.Reapply))
	return meta, info.Reapply, nil
}

// newModel turns the model and monitor sections into their options.
func newModel(cfg *config.Config) (*online.Model, *online.Monitor, error) {
	mc := cfg.Model
	mode := online.Explicit
	if mc.Mode == "implicit" {
		mode = online.Implicit
	}
	opts := online.Options{
		Rank:          mc.Rank,
		Mode:          mode,
		LearnRate:     mc.LearnRate,
		BiasLearnRate: mc.BiasLearnRate,
		Reg:           mc.Reg,
		BiasReg:       mc.BiasReg,
		NoReg:         true, // the config's values are explicit; zero means zero
		InitStd:       mc.InitStd,
		Decay:         mc.Decay,
		DecayFloor:    mc.DecayFloor,
		ClipError:     mc.ErrorClip,
		MaxUsers:      mc.MaxUsers,
		MaxItems:      mc.MaxItems,
		Seed:          mc.Seed,
	}
	if mode == online.Explicit {
		opts.MinValue, opts.MaxValue = mc.RatingMin, mc.RatingMax
	} else {
		opts.Negatives, opts.Pairwise = mc.Negatives, mc.Pairwise
	}
	m, err := online.New(opts)
	if err != nil {
		return nil, nil, asUsage(err)
	}
	mo := cfg.Monitor
	mon, err := online.NewMonitor(online.MonitorOptions{
		Mode:       mode,
		MinValue:   mc.RatingMin,
		MaxValue:   mc.RatingMax,
		Alpha:      mo.Fading,
		Window:     mo.Window,
		Delta:      mo.PageHinkley.Delta,
		Lambda:     mo.PageHinkley.Lambda,
		MinSamples: mo.PageHinkley.MinSamples,
		ADWIN:      mo.ADWIN.Enabled,
		ADWINDelta: mo.ADWIN.Delta,
		TopN:       mo.RecallTopN,
	})
	if err != nil {
		return nil, nil, asUsage(err)
	}
	return m, mon, nil
}

// trainerOptions turns the checkpoint and monitor sections into trainer
// options (the components are set by the caller).
func trainerOptions(cfg *config.Config) online.TrainerOptions {
	o := online.TrainerOptions{
		FlushInterval:    cfg.Checkpoint.FlushInterval,
		FlushRows:        cfg.Checkpoint.FlushRows,
		SnapshotInterval: cfg.Checkpoint.SnapshotInterval,
		Progress:         cfg.Monitor.ProgressInterval,
		RecallRate:       float64(cfg.Monitor.RecallRate),
		TopN:             cfg.Monitor.RecallTopN,
	}
	if o.Progress == 0 {
		o.Progress = -1
	}
	if o.RecallRate == 0 {
		o.RecallRate = -1
	}
	return o
}

// decodeOptions are the record checks that follow from the model section.
func decodeOptions(cfg *config.Config) stream.DecodeOptions {
	if cfg.Model.Mode == "implicit" {
		return stream.DecodeOptions{Implicit: true}
	}
	return stream.DecodeOptions{MinValue: cfg.Model.RatingMin, MaxValue: cfg.Model.RatingMax}
}

// newSource builds the configured source, resuming at from.
func newSource(cfg *config.Config, from stream.Position, rej stream.Rejecter) (stream.Source, error) {
	switch cfg.Source.Kind {
	case "scenario":
		return stream.NewScenario(scenarioOptions(cfg), from)
	case "file":
		f := cfg.Source.File
		format := f.Format
		if format == "auto" {
			format = ""
		}
		return stream.OpenFile(stream.FileOptions{
			Path: f.Path, Format: format, Follow: f.Follow,
			Decode: decodeOptions(cfg), BatchSize: cfg.Source.BatchSize, Rejects: rej,
		}, from)
	}
	return nil, usagef("source.kind %q is not available in this build", cfg.Source.Kind)
}

// scenarioOptions maps the scenario section. In explicit mode the demo's
// ratings are clipped to the model's scale and rounded to half stars, as a
// podcast app's star widget would record them.
func scenarioOptions(cfg *config.Config) stream.ScenarioOptions {
	sc := cfg.Source.Scenario
	o := stream.ScenarioOptions{
		Seed:        sc.Seed,
		Events:      sc.Events,
		BatchSize:   cfg.Source.BatchSize,
		Implicit:    cfg.Model.Mode == "implicit",
		Rank:        sc.Rank,
		Communities: sc.Communities,
		Listeners:   sc.Listeners,
		Shows:       sc.Shows,
		Noise:       sc.Noise,
		ShiftAt:     sc.ShiftAt,
		Rate:        sc.Rate,
	}
	if !o.Implicit {
		o.ClipMin, o.ClipMax = cfg.Model.RatingMin, cfg.Model.RatingMax
		o.Mean = (cfg.Model.RatingMin + cfg.Model.RatingMax) / 2
		o.Step = 0.5
	}
	return o
}
