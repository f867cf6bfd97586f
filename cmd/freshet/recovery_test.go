package main

import (
	"bytes"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"syscall"
	"testing"
	"time"

	"freshet.dev/freshet/online"
)

// TestKillRecovery kills the unpaced finite demo with SIGKILL at seeded random
// points, restarts it each time, and lets the last run reach the end of the
// scenario (io.EOF, drain, exit 0). It checks that
//
//   - every restart resumes at a durable cut: position = event count, and
//     the first run's work beyond that cut (re-applied events) stays within
//     the bound below;
//   - the final count is N exactly and the position is event N;
//   - the final state equals an uninterrupted run of the same N events, row
//     for row and bit for bit.
//
// Why equality holds even though events are re-applied: a restart loads the
// state of the last durable cut, which does not include any event after it,
// and the source resumes at that cut's position. The events the killed run
// had applied beyond the cut are lost with its memory, not added twice: the
// resumed run applies each of them exactly once to exactly the state the
// uninterrupted run had at that point. The scenario is deterministic from its
// position, batches start at the same event indices (every cut is at a batch
// boundary and batches are full), and the cut holds everything else the
// steps depend on: the row init generator, the negative sampler's generator
// and its reservoir (implicit mode), the global mean and the monitor's state.
// Only the wall-clock parts differ (rates, number of cuts, snapshots), and
// those are not compared. Implicit mode runs with recall sampling off, since
// that sampling is paced by the wall clock (it changes the monitor, not the
// model).
//
// The kill points are seeded, but where a delay lands in the run depends on
// the machine's speed, so the event counts differ from run to run.
func TestKillRecovery(t *testing.T) {
	// N is sized so that a run lasts a second or more, long enough to be
	// killed at a random point and to take a snapshot (unpaced on this
	// machine: explicit ~1.4 M events/s plain, ~75 k under -race; implicit
	// with 3 negatives ~300 k plain).
	t.Run("explicit", func(t *testing.T) {
		n := 3000000
		if raceEnabled {
			n = 150000
		}
		killRecovery(t, demoEnv(n, 0), uint64(n), []string{"rmse", "mae", "rmse_window", "cold_share"})
	})
	t.Run("implicit", func(t *testing.T) {
		n := 600000
		if raceEnabled {
			n = 40000
		}
		env := demoEnv(n, 0)
		env["FRESHET_MODEL_MODE"] = "implicit"
		env["FRESHET_MONITOR_RECALL_RATE"] = "0"
		killRecovery(t, env, uint64(n), []string{"cold_share"})
	})
}

func killRecovery(t *testing.T, env map[string]string, n uint64, compare []string) {
	// Snapshots every second (the shortest allowed), so that a kill can
	// land during one and recovery reads a snapshot plus the logs after it.
	env["FRESHET_CHECKPOINT_SNAPSHOT_INTERVAL"] = "1s"
	flush := 50 * time.Millisecond // FRESHET_CHECKPOINT_FLUSH_INTERVAL in demoEnv

	// The uninterrupted reference.
	refDir := t.TempDir()
	t0 := time.Now()
	_, _, refStop := runToEnd(t, refDir, env)
	refElapsed := time.Since(t0)
	if got := refStop.uint(t, "events"); got != n {
		t.Fatalf("reference run stopped at %d events, want %d", got, n)
	}

	dir := t.TempDir()
	rng := rand.New(rand.NewPCG(20261202, 9))
	var prev *killed // the last run killed, for the next restart to check
	var resumedAt, reappliedSum uint64
	kills, fromSnapshot := 0, 0
	// check verifies the restart after a kill: it resumes at a durable cut
	// (position = event count) no further back than the bound allows.
	check := func(resumed logLine) {
		t.Helper()
		var r uint64
		if resumed.Fields == nil {
			// Killed before its first cut was durable: the restart is a
			// new model from event 0 (allowed, within the bound).
			t.Logf("kill %d: nothing was durable; the restart began at event 0", kills)
		} else {
			r = resumed.uint(t, "events")
		}
		if r > 0 && resumed.str("position") != scenarioPos(r) {
			t.Fatalf("resumed at %q with %d events: the position must be the event count", resumed.str("position"), r)
		}
		if r < resumedAt {
			t.Fatalf("resumed at %d events, before the previous restart's %d", r, resumedAt)
		}
		// Re-applied events, as far as the logs tell: the killed run had
		// applied at least lastEvents (negative: the newest durable cut
		// came after its last progress line).
		reapplied := int64(prev.lastEvents) - int64(r)
		// Bound asserted: a cut is taken at the first batch boundary after
		// each flush interval and is durable once its fsync returns, so
		// the work lost is one flush interval at the run's rate, plus the
		// batch in hand, plus what was applied while the newest cut's
		// fsync ran, allowed 100 ms on this shared disk. The rate is the
		// fastest progress line's (each averages 100 ms), taken 1.5 times
		// for bursts within a line. (The hard ceiling of the design is
		// about six intervals: the writer queue holds 4 cuts, one is being
		// written and one is building, before the trainer blocks.)
		bound := int64(1.5*prev.rateMax*(flush+100*time.Millisecond).Seconds()) + demoBatch
		t.Logf("kill %d: %v after the first progress line, the last one at %d events (%.0f events/s max, %d snapshots); resumed at %d: %d re-applied (bound %d)",
			kills, prev.delay.Round(time.Millisecond), prev.lastEvents, prev.rateMax, prev.snapshots, r, reapplied, bound)
		if reapplied > bound {
			t.Errorf("kill %d: the killed run had applied at least %d events beyond its last durable cut (at %d); bound %d",
				kills, reapplied, r, bound)
		}
		if resumed.Fields != nil {
			// The exact count, from the checkpoint's mark: the killed run
			// marked its applied total at every batch boundary, before
			// logging, so it is at least what the logs show.
			exact := int64(resumed.uint(t, "reapply"))
			reappliedSum += uint64(exact)
			t.Logf("kill %d: the mark says %d events re-applied", kills, exact)
			if exact < reapplied || exact > bound {
				t.Errorf("kill %d: %d events re-applied by the mark; want at least %d (the logs) and at most %d", kills, exact, reapplied, bound)
			}
		}
		resumedAt = r
	}
	for round := 0; round < 3; round++ {
		p := start(t, env, "run", "-data", dir)
		if prev != nil {
			// "resumed" comes before any other trainer line, if at all.
			first, _ := p.mustLine(0, procTimeout, "first trainer", func(l logLine) bool {
				return l.str("logger") == "trainer"
			})
			if first.msg() != "resumed" {
				first = logLine{}
			}
			if rec, _, ok := p.waitLine(0, 0, msgIs("recovered")); ok && rec.str("snapshot") != "" {
				fromSnapshot++
			}
			check(first)
			prev = nil
		}
		// Kill at a seeded random delay after the first progress line: up
		// to 80% of the reference run's duration (so some kills come after
		// the first snapshot, at 1 s), while the run has at least 40% of N
		// ahead of it (else stop killing).
		if resumedAt+n/10 >= n*6/10 {
			p.signal(syscall.SIGTERM) // done with kills; the final run below ends it
			if code, _ := p.wait(procTimeout); code != 0 {
				t.Fatalf("exit code %d after SIGTERM; log:\n%s", code, p.dump())
			}
			break
		}
		k := &killed{delay: time.Duration(rng.Int64N(int64(refElapsed * 8 / 10)))}
		_, i, ok := p.waitLine(0, procTimeout, msgIs("progress"))
		if !ok {
			if _, _, done := p.waitLine(0, 0, msgIs("stopped")); done {
				t.Logf("round %d: the run ended before its first progress line; no kill", round)
				break
			}
			t.Fatalf("no progress line; log:\n%s", p.dump())
		}
		time.Sleep(k.delay)
		_ = p.cmd.Process.Signal(syscall.SIGKILL) // fails only when it has exited
		code, sig := p.wait(procTimeout)
		if !sig {
			if code != 0 {
				t.Fatalf("exit code %d; log:\n%s", code, p.dump())
			}
			t.Logf("round %d: the run ended within the %s delay", round, k.delay)
			break
		}
		kills++
		// The last progress line the killed run wrote is a lower bound on
		// what it had applied.
		lines := p.snapshot()
		for _, l := range lines[i:] {
			if l.msg() == "snapshot written" {
				k.snapshots++
			}
			if l.msg() == "progress" {
				k.lastEvents = l.uint(t, "events")
			}
		}
		for _, l := range lines {
			if l.msg() == "progress" {
				k.rateMax = math.Max(k.rateMax, l.float(t, "events_per_s"))
			}
		}
		prev = k
	}
	if kills == 0 {
		t.Fatalf("no run was killed (the reference took %s): the scenario is too short for this machine", refElapsed)
	}

	// A torn tail on top of the last kill: junk after the newest log's
	// last record (when the kill left a log at all). The final run must
	// drop it (and anything the kill itself tore) and still end identical.
	var junkLog string
	var junkEnd int64
	if logs, _ := filepath.Glob(filepath.Join(dir, "log-*.bin")); prev != nil && len(logs) > 0 {
		junkLog = newestLog(t, dir)
		f, err := os.OpenFile(junkLog, os.O_WRONLY|os.O_APPEND, 0)
		if err != nil {
			t.Fatal(err)
		}
		if _, err := f.Write([]byte("\x00\x00\x01torn")); err != nil {
			t.Fatal(err)
		}
		f.Close()
		junkEnd = fileSize(t, junkLog)
	}

	t1 := time.Now()
	q, resumed, stop := runToEnd(t, dir, env)
	if prev != nil {
		check(resumed)
	}
	if junkLog != "" {
		w, _ := q.mustLine(0, 0, "torn tail warning", msgIs("dropped torn log tail"))
		if w.str("file") != filepath.Base(junkLog) || w.uint(t, "offset")+w.uint(t, "bytes") != uint64(junkEnd) || w.uint(t, "bytes") < 7 {
			t.Fatalf("warning %s; want %s cut from %d bytes, at least the 7 appended", w.Raw, filepath.Base(junkLog), junkEnd)
		}
	}
	if rec, _, ok := q.waitLine(0, 0, msgIs("recovered")); ok && rec.str("snapshot") != "" {
		fromSnapshot++
	}
	t.Logf("%d kills, %d restarts from a snapshot; the reference took %s, the final run %s from event %d", kills, fromSnapshot, refElapsed.Round(time.Millisecond),
		time.Since(t1).Round(time.Millisecond), resumedAt)
	if got := stop.uint(t, "events"); got != n {
		t.Fatalf("final run stopped at %d events, want exactly %d", got, n)
	}
	if got := stop.str("position"); got != scenarioPos(n) {
		t.Fatalf("final position %q, want %q", got, scenarioPos(n))
	}

	// The logged prequential figures of the final stop and the reference
	// (full float64 precision in the JSON lines).
	for _, k := range compare {
		a, b := stop.float(t, k), refStop.float(t, k)
		if math.Abs(a-b) > 1e-9*math.Abs(b) {
			t.Errorf("%s: %.17g after the kills, %.17g uninterrupted", k, a, b)
		}
	}

	got, want := recoverDir(t, dir, env), recoverDir(t, refDir, env)
	// Reapplied is the one count that differs: it tallies, across the
	// restarts, the events each kill left to be applied again.
	gotCounts := got.meta.Counts
	if gotCounts.Reapplied != reappliedSum || want.meta.Counts.Reapplied != 0 {
		t.Errorf("reapplied %d after the kills (the restarts' marks add up to %d), %d uninterrupted (want 0)",
			gotCounts.Reapplied, reappliedSum, want.meta.Counts.Reapplied)
	}
	gotCounts.Reapplied = 0
	if gotCounts != want.meta.Counts || got.meta.Counts.Applied != n {
		t.Fatalf("counts %+v after the kills, %+v uninterrupted (want %d applied)", got.meta.Counts, want.meta.Counts, n)
	}
	if got.meta.Position.String() != want.meta.Position.String() || got.meta.Time != want.meta.Time {
		t.Fatalf("position %s time %d after the kills, %s %d uninterrupted", got.meta.Position, got.meta.Time, want.meta.Position, want.meta.Time)
	}
	if !bytes.Equal(got.meta.Monitor, want.meta.Monitor) {
		t.Errorf("monitor state differs:\n%s\n%s", got.meta.Monitor, want.meta.Monitor)
	}
	gm, wm := got.meta.Model, want.meta.Model
	if gm.MeanSum != wm.MeanSum || gm.MeanComp != wm.MeanComp || gm.MeanN != wm.MeanN || gm.Next != wm.Next ||
		!bytes.Equal(gm.RNG, wm.RNG) || !slices.Equal(gm.Recent, wm.Recent) {
		t.Errorf("model meta differs: %+v vs %+v", gm, wm)
	}
	for s := online.Users; s <= online.Items; s++ {
		compareRows(t, s, got.rows[s], want.rows[s])
	}
}

// killed describes a run stopped with SIGKILL.
type killed struct {
	delay      time.Duration // from the first progress line to the signal
	snapshots  int           // snapshots it completed
	lastEvents uint64        // events of the last progress line it wrote
	rateMax    float64       // its fastest progress line, events/s
}

// compareRows requires two copies of a table to be identical.
func compareRows(t *testing.T, s online.Side, got, want *online.RowSet) {
	t.Helper()
	if got.Len() != want.Len() {
		t.Fatalf("%s table: %d rows after the kills, %d uninterrupted", s, got.Len(), want.Len())
	}
	for j := range got.Recs {
		g, w := &got.Recs[j], &want.Recs[j]
		if !bytes.Equal(g.ID, w.ID) || g.Bias != w.Bias || g.Count != w.Count || g.Last != w.Last || g.Deleted != w.Deleted {
			t.Fatalf("%s row %d: %q bias %v count %d last %d after the kills; %q %v %d %d uninterrupted",
				s, j, g.ID, g.Bias, g.Count, g.Last, w.ID, w.Bias, w.Count, w.Last)
		}
		for k := range g.Vec {
			if g.Vec[k] != w.Vec[k] {
				t.Fatalf("%s row %d (%s) factor %d: %v after the kills, %v uninterrupted", s, j, g.ID, k, g.Vec[k], w.Vec[k])
			}
		}
	}
}
