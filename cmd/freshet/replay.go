package main

import (
	"bufio"
	"context"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"strconv"
	"text/tabwriter"
	"time"

	"go.uber.org/zap"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/stream"
)

// memCheckpoint is the Checkpointer of an offline replay: nothing is kept,
// since a replay is repeated from the start rather than resumed.
type memCheckpoint struct{}

func (memCheckpoint) Append(*online.RowSet, *online.Meta) error { return nil }
func (memCheckpoint) BeginSnapshot(*online.Meta) error          { return nil }
func (memCheckpoint) WriteRows(*online.RowSet) error            { return nil }
func (memCheckpoint) Commit(*online.Meta) error                 { return nil }

// runReplay evaluates a file offline, test-then-train, and prints a summary;
// with -curve it writes the prequential curve as CSV.
func runReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("replay", flag.ContinueOnError)
	fs.SetOutput(stderr)
	cfgPath := fs.String("config", "", "configuration `file` for the model and monitor sections")
	file := fs.String("file", "", "events `file` to replay (jsonl, csv or tsv; .gz read transparently)")
	format := fs.String("format", "", "file format: jsonl, csv or tsv (default: from the extension)")
	curve := fs.String("curve", "", "write the prequential curve to this CSV `file`")
	every := fs.Uint64("every", 1000, "curve sampling: one row per `N` events")
	recallEvery := fs.Int("recall-every", 100, "implicit mode: evaluate recall@N on every `N`-th event")
	rejects := fs.String("rejects", "", "write rejected records to this `file` (default: counted only)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *file == "" {
		return usagef("replay: -file is required")
	}
	if *every == 0 {
		return usagef("replay: -every must be positive")
	}
	cfg, err := loadConfig(*cfgPath, "")
	if err != nil {
		return err
	}
	m, mon, err := newModel(cfg)
	if err != nil {
		return err
	}
	var rej stream.Rejecter
	if *rejects != "" {
		rf, err := stream.OpenRejectFile(*rejects)
		if err != nil {
			return err
		}
		defer rf.Close()
		rej = rf
	}
	src, err := stream.OpenFile(stream.FileOptions{
		Path: *file, Format: *format, Decode: decodeOptions(cfg),
		BatchSize: cfg.Source.BatchSize, Rejects: rej,
	}, stream.Position{})
	if err != nil {
		return asUsage(err)
	}
	defer src.Close()

	var cw *bufio.Writer
	if *curve != "" {
		f, err := os.Create(*curve)
		if err != nil {
			return err
		}
		defer f.Close()
		cw = bufio.NewWriter(f)
		fmt.Fprintln(cw, "events,rmse_fading,mae_fading,rmse_window,mae_window,recall_fading,recall_window,cold_share,ph_statistic,alarms")
	}
	var alarms []online.Alarm
	to := trainerOptions(cfg)
	to.Model, to.Monitor, to.Source, to.Checkpoint = m, mon, src, memCheckpoint{}
	to.SnapshotInterval, to.Progress, to.RecallEvery = -1, -1, *recallEvery
	to.OnAlarm = func(a online.Alarm) { alarms = append(alarms, a) }
	to.CurveEvery = *every
	if cw != nil {
		to.Curve = func(c online.Counts, st online.MonitorStatus) {
			fmt.Fprintf(cw, "%d,%s,%s,%s,%s,%s,%s,%s,%s,%d\n", c.Applied,
				ff(st.RMSEFading), ff(st.MAEFading), ff(st.RMSEWindow), ff(st.MAEWindow),
				ff(st.RecallFading), ff(st.RecallWindow), ff(st.ColdEitherShare), ff(st.PHStat),
				st.PHAlarms+st.ADWINAlarms)
		}
	}
	to.Logger = zap.NewNop()
	tr, err := online.NewTrainer(to)
	if err != nil {
		return err
	}
	start := time.Now()
	if err := tr.Run(ctx); err != nil {
		return err
	}
	el := time.Since(start)
	if cw != nil {
		if err := cw.Flush(); err != nil {
			return fmt.Errorf("write curve: %w", err)
		}
	}
	c, st := tr.Counts(), mon.Status()
	tw := tabwriter.NewWriter(stdout, 0, 0, 2, ' ', 0)
	fmt.Fprintf(tw, "file\t%s\n", *file)
	fmt.Fprintf(tw, "mode\t%s, rank %d\n", m.Options().Mode, m.Rank())
	fmt.Fprintf(tw, "events applied\t%d\n", c.Applied)
	fmt.Fprintf(tw, "records rejected\t%d\n", c.Rejected)
	fmt.Fprintf(tw, "users, items\t%d, %d\n", m.Live(online.Users), m.Live(online.Items))
	if st.Events > 0 {
		fmt.Fprintf(tw, "prequential RMSE, all events\t%.4f\n", math.Sqrt(st.SquaredErrorTotal/float64(st.Events)))
		fmt.Fprintf(tw, "prequential MAE, all events\t%.4f\n", st.AbsErrorTotal/float64(st.Events))
	}
	fmt.Fprintf(tw, "RMSE fading / window\t%.4f / %.4f\n", st.RMSEFading, st.RMSEWindow)
	if m.Options().Mode == online.Implicit {
		fmt.Fprintf(tw, "recall@%d (%d evaluations)\t%.4f\n", st.RecallN, st.Evaluations, ratio(st.Hits, st.Evaluations))
	}
	fmt.Fprintf(tw, "cold-start share\t%.4f\n", st.ColdEitherShare)
	fmt.Fprintf(tw, "drift alarms\t%d (Page-Hinkley %d, ADWIN %d)\n", st.PHAlarms+st.ADWINAlarms, st.PHAlarms, st.ADWINAlarms)
	for _, a := range alarms {
		fmt.Fprintf(tw, "  alarm at event\t%d\n", a.Event)
	}
	fmt.Fprintf(tw, "elapsed\t%s (%.0f events/s)\n", el.Round(time.Millisecond), float64(c.Applied)/el.Seconds())
	return tw.Flush()
}

func ff(x float64) string { return strconv.FormatFloat(x, 'g', 8, 64) }

func ratio(a, b uint64) float64 {
	if b == 0 {
		return 0
	}
	return float64(a) / float64(b)
}

// runGenerate writes the demo scenario as JSON lines.
func runGenerate(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("generate", flag.ContinueOnError)
	fs.SetOutput(stderr)
	cfgPath := fs.String("config", "", "configuration `file` for the scenario and model sections")
	events := fs.Int64("events", 100000, "number of `events` to write")
	out := fs.String("o", "-", "output `file` (- for standard output)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *events <= 0 {
		return usagef("generate: -events must be positive")
	}
	cfg, err := loadConfig(*cfgPath, "")
	if err != nil {
		return err
	}
	so := scenarioOptions(cfg)
	so.Events = *events
	sc, err := stream.NewScenario(so, stream.Position{})
	if err != nil {
		return asUsage(err)
	}
	defer sc.Close()
	w := stdout
	if *out != "-" {
		f, err := os.Create(*out)
		if err != nil {
			return err
		}
		defer f.Close()
		w = f
	}
	bw := bufio.NewWriterSize(w, 1<<16)
	if _, err := sc.WriteTo(bw); err != nil {
		return err
	}
	return bw.Flush()
}
