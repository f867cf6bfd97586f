package main

import (
	"bytes"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"
)

const (
	procTimeout = 30 * time.Second // generous: -race and a shared 2-core machine
	demoBatch   = 256              // source.batch_size default
)

// scenarioPos is how the scenario source's position prints after n events
// (stream.Position.String) with the seed demoEnv sets.
func scenarioPos(n uint64) string { return fmt.Sprintf("scenario seed 3 event %d", n) }

// TestCleanStopResume stops the paced demo with SIGTERM, then restarts it:
// the restart resumes at exactly the stopped position and count, and keeps
// counting from there.
func TestCleanStopResume(t *testing.T) {
	dir := t.TempDir()
	env := demoEnv(0, 20000) // endless, 20,000 events/s

	p := start(t, env, "run", "-data", dir)
	p.mustLine(0, procTimeout, "progress", func(l logLine) bool { return l.msg() == "progress" && l.uint(t, "events") > 0 })
	p.signal(syscall.SIGTERM)
	if code, sig := p.wait(procTimeout); code != 0 || sig {
		t.Fatalf("exit code %d (signaled %v) after SIGTERM, want 0; log:\n%s", code, sig, p.dump())
	}
	stopped, _ := p.mustLine(0, 0, "stopped", msgIs("stopped"))
	events, pos := stopped.uint(t, "events"), stopped.str("position")
	if events == 0 || pos != scenarioPos(events) {
		t.Fatalf("stopped at %d events, position %q; want the position to be event %d", events, pos, events)
	}
	if strings.Contains(p.stderrText(), "stopped on error") {
		t.Fatalf("error during a clean stop:\n%s", p.dump())
	}

	q := start(t, env, "run", "-data", dir)
	resumed, i := q.mustLine(0, procTimeout, "resumed", msgIs("resumed"))
	if got := resumed.str("position"); got != pos {
		t.Fatalf("resumed at %q, stopped at %q", got, pos)
	}
	if got := resumed.uint(t, "events"); got != events {
		t.Fatalf("resumed with %d events, stopped with %d", got, events)
	}
	q.mustLine(i, procTimeout, "progress beyond the stop", func(l logLine) bool {
		return l.msg() == "progress" && l.uint(t, "events") > events
	})
	q.signal(syscall.SIGINT)
	if code, sig := q.wait(procTimeout); code != 0 || sig {
		t.Fatalf("exit code %d (signaled %v) after SIGINT, want 0; log:\n%s", code, sig, q.dump())
	}
	stopped2, _ := q.mustLine(i, 0, "stopped", msgIs("stopped"))
	e2 := stopped2.uint(t, "events")
	if e2 <= events || stopped2.str("position") != scenarioPos(e2) {
		t.Fatalf("second stop at %d events (%s), first at %d", e2, stopped2.str("position"), events)
	}
	// The directory holds the last cut: what the log line said.
	d := recoverDir(t, dir, env)
	if d.meta.Counts.Applied != e2 || d.meta.Position.String() != stopped2.str("position") {
		t.Fatalf("checkpoint holds %d events at %s; the stop logged %d at %s",
			d.meta.Counts.Applied, d.meta.Position, e2, stopped2.str("position"))
	}
	t.Logf("first run stopped at %d events, second at %d", events, e2)
}

// TestSecondDaemonRefused starts two daemons on one data directory: the
// second fails at once with the lock error and a non-zero exit, and the first
// is not disturbed.
func TestSecondDaemonRefused(t *testing.T) {
	dir := t.TempDir()
	env := demoEnv(0, 5000)
	first := start(t, env, "run", "-data", dir)
	first.mustLine(0, procTimeout, "started", msgIs("started"))

	second := start(t, env, "run", "-data", dir)
	code, sig := second.wait(procTimeout)
	if code == 0 || sig {
		t.Fatalf("second daemon exit code %d (signaled %v), want a failure; log:\n%s", code, sig, second.dump())
	}
	msg := second.stderrText()
	if !strings.Contains(msg, "locked") || !strings.Contains(msg, "data directory") {
		t.Fatalf("second daemon's error does not say the data directory is locked:\n%s", msg)
	}
	if want := fmt.Sprintf("held by process %d", first.cmd.Process.Pid); !strings.Contains(msg, want) {
		t.Errorf("error %q does not name the owner (%q)", msg, want)
	}
	if code != 1 {
		t.Errorf("exit code %d, want 1 (a runtime failure, not a configuration mistake)", code)
	}

	first.mustLine(0, procTimeout, "progress", func(l logLine) bool { return l.msg() == "progress" && l.uint(t, "events") > 0 })
	first.signal(syscall.SIGTERM)
	if code, sig := first.wait(procTimeout); code != 0 || sig {
		t.Fatalf("first daemon exit code %d (signaled %v) after the refused second, want 0; log:\n%s", code, sig, first.dump())
	}
	t.Logf("second daemon: %s", strings.TrimSpace(msg))
}

// runToEnd runs the finite demo in dir until it ends by itself and returns
// the "resumed" line (if any) and the "stopped" line.
func runToEnd(t *testing.T, dir string, env map[string]string) (p *proc, resumed, stopped logLine) {
	t.Helper()
	p = start(t, env, "run", "-data", dir)
	if code, sig := p.wait(procTimeout * 2); code != 0 || sig {
		t.Fatalf("exit code %d (signaled %v), want 0; log:\n%s", code, sig, p.dump())
	}
	resumed, _, _ = p.waitLine(0, 0, msgIs("resumed"))
	stopped, _ = p.mustLine(0, 0, "stopped", msgIs("stopped"))
	return p, resumed, stopped
}

// TestTornLogTail damages the newest log after a clean finish, two ways: junk
// appended after the last record (a partial frame), and the last record cut
// in the middle. The restart drops the torn bytes with a warning, resumes at
// the last good record and the finite run ends at N events again.
func TestTornLogTail(t *testing.T) {
	const n = 40000
	env := demoEnv(n, 0)

	t.Run("junk appended", func(t *testing.T) {
		dir := t.TempDir()
		_, _, stopped := runToEnd(t, dir, env)
		if got := stopped.uint(t, "events"); got != n {
			t.Fatalf("first run stopped at %d events, want %d", got, n)
		}
		log := newestLog(t, dir)
		size := fileSize(t, log)
		junk := []byte{0x5a, 0x00, 0x00, 0x10, 0xde, 0xad, 0xbe, 0xef, 'j', 'u', 'n', 'k'}
		f, err := os.OpenFile(log, os.O_WRONLY|os.O_APPEND, 0)
		if err != nil {
			t.Fatal(err)
		}
		if _, err := f.Write(junk); err != nil {
			t.Fatal(err)
		}
		f.Close()

		p, resumed, stopped2 := runToEnd(t, dir, env)
		w, _ := p.mustLine(0, 0, "torn tail warning", msgIs("dropped torn log tail"))
		if w.str("level") != "warn" || w.uint(t, "offset") != uint64(size) || w.uint(t, "bytes") != uint64(len(junk)) {
			t.Fatalf("warning %s; want level warn, offset %d, bytes %d", w.Raw, size, len(junk))
		}
		if resumed.Fields == nil || resumed.uint(t, "events") != n || resumed.str("position") != scenarioPos(n) {
			t.Fatalf("resumed line %q; want %d events at %s", resumed.Raw, n, scenarioPos(n))
		}
		if stopped2.uint(t, "events") != n {
			t.Fatalf("stopped at %d events, want %d", stopped2.uint(t, "events"), n)
		}
		if got := fileSize(t, log); got != size {
			t.Fatalf("log is %d bytes after recovery, want it cut back to %d", got, size)
		}
	})

	t.Run("last record cut", func(t *testing.T) {
		dir := t.TempDir()
		// A cut whenever 400 of the 600 rows are dirty: many records
		// however fast the machine runs the 40,000 events.
		env := demoEnv(n, 0)
		env["FRESHET_CHECKPOINT_FLUSH_ROWS"] = "400"
		_, _, stopped := runToEnd(t, dir, env)
		if got := stopped.uint(t, "events"); got != n {
			t.Fatalf("first run stopped at %d events, want %d", got, n)
		}
		before := recoverDir(t, dir, env)
		if before.info.Records < 2 {
			t.Skipf("the run made %d cut(s); need two to cut the last one", before.info.Records)
		}
		log := newestLog(t, dir)
		size := fileSize(t, log)
		// 16 bytes are well inside the last record: every record holds a
		// JSON meta of several hundred bytes.
		cut := size - 16
		if err := os.Truncate(log, cut); err != nil {
			t.Fatal(err)
		}

		p, resumed, stopped2 := runToEnd(t, dir, env)
		w, _ := p.mustLine(0, 0, "torn tail warning", msgIs("dropped torn log tail"))
		off, dropped := w.uint(t, "offset"), w.uint(t, "bytes")
		if off+dropped != uint64(cut) || off == 0 || off >= uint64(cut) {
			t.Fatalf("warning %s: offset+bytes should be the cut size %d", w.Raw, cut)
		}
		if resumed.Fields == nil {
			t.Fatalf("no resumed line; log:\n%s", p.dump())
		}
		r := resumed.uint(t, "events")
		if r >= n || resumed.str("position") != scenarioPos(r) || resumed.uint(t, "seq") != before.meta.Seq-1 {
			t.Fatalf("resumed %s; want the cut before the last (seq %d), short of %d events", resumed.Raw, before.meta.Seq-1, n)
		}
		if got := stopped2.uint(t, "events"); got != n || stopped2.str("position") != scenarioPos(n) {
			t.Fatalf("stopped at %d events (%s), want %d", got, stopped2.str("position"), n)
		}
		after := recoverDir(t, dir, env)
		if after.meta.Counts.Applied != n || after.meta.Position.Offset != n {
			t.Fatalf("checkpoint after the rerun: %d applied at %s, want %d", after.meta.Counts.Applied, after.meta.Position, n)
		}
		t.Logf("cut %d of %d bytes; resumed at event %d, re-applied %d events to reach %d", size-cut, size, r, n-r, n)
	})
}

func fileSize(t *testing.T, path string) int64 {
	t.Helper()
	fi, err := os.Stat(path)
	if err != nil {
		t.Fatal(err)
	}
	return fi.Size()
}

// TestModelMismatchRefused restarts a data directory with another rank and
// another mode: both are configuration mistakes (exit 2) that name what the
// directory holds, and the directory is left as it was.
func TestModelMismatchRefused(t *testing.T) {
	dir := t.TempDir()
	env := demoEnv(5000, 0)
	_, _, stopped := runToEnd(t, dir, env)
	for name, over := range map[string][2]string{
		"rank": {"FRESHET_MODEL_RANK", "16"},
		"mode": {"FRESHET_MODEL_MODE", "implicit"},
	} {
		t.Run(name, func(t *testing.T) {
			e := demoEnv(5000, 0)
			e[over[0]] = over[1]
			p := start(t, e, "run", "-data", dir)
			code, sig := p.wait(procTimeout)
			msg := p.stderrText()
			if code != 2 || sig {
				t.Fatalf("exit code %d (signaled %v), want 2:\n%s", code, sig, msg)
			}
			if !strings.Contains(msg, "data directory holds") || !strings.Contains(msg, "rank 8") || !strings.Contains(msg, over[1]) {
				t.Fatalf("message does not say what the directory holds and what was asked:\n%s", msg)
			}
		})
	}
	d := recoverDir(t, dir, env)
	if d.meta.Counts.Applied != stopped.uint(t, "events") {
		t.Fatalf("the refused runs changed the directory: %d events, stopped at %d", d.meta.Counts.Applied, stopped.uint(t, "events"))
	}
}

// TestFileSourceDaemon runs the daemon on the shared ratings file: it ends by
// itself with the counts a replay gives (the same events, test-then-train, so
// the same prequential RMSE), sets the bad records aside once in the data
// directory's rejects file, and a restart resumes at the end of the file
// without reading or rejecting anything again.
func TestFileSourceDaemon(t *testing.T) {
	file, err := filepath.Abs(filepath.Join(eventsDir, "podcast-ratings-seed1.jsonl"))
	if err != nil {
		t.Fatal(err)
	}
	bad, total := badValueLines(t, file, 1, 5)
	dir := t.TempDir()
	env := map[string]string{"FRESHET_SOURCE_KIND": "file", "FRESHET_SOURCE_FILE_PATH": file}
	_, _, stopped := runToEnd(t, dir, env)
	if got := stopped.uint(t, "events"); got != uint64(total)-uint64(len(bad)) {
		t.Fatalf("applied %d, want %d", got, uint64(total)-uint64(len(bad)))
	}
	if got := stopped.uint(t, "rejected"); got != uint64(len(bad)) {
		t.Fatalf("rejected %d, want %d", got, len(bad))
	}
	wantPos := fmt.Sprintf("file %s line %d offset %d", file, total+1, fileSize(t, file))
	if got := stopped.str("position"); got != wantPos {
		t.Fatalf("stopped at %q, want %q", got, wantPos)
	}
	rejects := filepath.Join(dir, "rejects.jsonl")
	if n := countLines(t, rejects); n != len(bad) {
		t.Fatalf("rejects file has %d lines, want %d", n, len(bad))
	}

	// The replay of the same file: its curve's last row (every boundary,
	// 8 significant digits) is the daemon's final fading RMSE.
	curve := filepath.Join(t.TempDir(), "curve.csv")
	summary(t, "replay", "-file", file, "-curve", curve, "-every", "1")
	rows := readCurve(t, curve)
	last := rows[len(rows)-1]
	if r := stopped.float(t, "rmse"); math.Abs(r-last[1]) > 1e-7*last[1] {
		t.Fatalf("daemon RMSE %.10g, replay %.10g", r, last[1])
	}

	p, resumed, stopped2 := runToEnd(t, dir, env)
	if resumed.Fields == nil || resumed.str("position") != wantPos || stopped2.uint(t, "events") != stopped.uint(t, "events") {
		t.Fatalf("restart: resumed %q, stopped %q; log:\n%s", resumed.Raw, stopped2.Raw, p.dump())
	}
	if n := countLines(t, rejects); n != len(bad) {
		t.Fatalf("rejects file has %d lines after the restart, want %d", n, len(bad))
	}
}

func countLines(t *testing.T, path string) int {
	t.Helper()
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return bytes.Count(raw, []byte{'\n'})
}
