package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"freshet.dev/freshet/config"
	"freshet.dev/freshet/stream"
)

var eventsDir = filepath.Join("..", "..", "testdata", "events")

// TestBadConfigExitCodes checks that configuration and usage mistakes exit 2
// with a message that names the place of the mistake.
func TestBadConfigExitCodes(t *testing.T) {
	dir := t.TempDir()
	bad := filepath.Join(dir, "bad.yaml")
	if err := os.WriteFile(bad, []byte("model:\n  rank: 8\n  rnak: 3\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		name string
		env  map[string]string
		args []string
		want []string // substrings of stderr
	}{
		{"unknown key", nil, []string{"run", "-config", bad, "-data", dir}, []string{bad + ":3:", `"model.rnak"`}},
		{"bad environment value", map[string]string{"FRESHET_MODEL_RANK": "abc"}, []string{"run", "-data", dir},
			[]string{"FRESHET_MODEL_RANK", "model.rank", `"abc"`}},
		{"unknown command", nil, []string{"frob"}, []string{`unknown command "frob"`}},
		{"unknown flag", nil, []string{"run", "-frob"}, []string{"frob"}},
		{"replay without a file", nil, []string{"replay"}, []string{"-file is required"}},
		{"replay of a missing file", nil, []string{"replay", "-file", filepath.Join(dir, "none.jsonl")}, []string{"none.jsonl"}},
		{"generate nothing", nil, []string{"generate", "-events", "0"}, []string{"-events must be positive"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			p := start(t, c.env, c.args...)
			code, sig := p.wait(procTimeout)
			msg := p.stderrText()
			if code != 2 || sig {
				t.Fatalf("exit code %d (signaled %v), want 2; stderr:\n%s", code, sig, msg)
			}
			for _, w := range c.want {
				if !strings.Contains(msg, w) {
					t.Errorf("stderr does not contain %q:\n%s", w, msg)
				}
			}
			if strings.Contains(msg, "goroutine ") || strings.Contains(msg, "panic") {
				t.Errorf("a crash, not an error:\n%s", msg)
			}
		})
	}
	// Nothing was created in the data directory by the refused runs.
	if _, err := os.Stat(filepath.Join(dir, "LOCK")); err == nil {
		t.Errorf("a refused configuration still opened the data directory")
	}
}

// TestCheckExamples runs "run -check" on every example configuration shipped
// under deploy/. production.yaml names a password variable and a mounted
// password file: the test sets the variable and points the file at a
// temporary one through FRESHET_REDIS_PASSWORD_FILE (an environment override),
// and checks that neither secret is printed.
func TestCheckExamples(t *testing.T) {
	files, err := filepath.Glob(filepath.Join("..", "..", "deploy", "*.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	more, _ := filepath.Glob(filepath.Join("..", "..", "deploy", "examples", "*.yaml"))
	files = append(files, more...)
	if len(files) < 6 {
		t.Fatalf("found %d example files, want the 6 shipped: %v", len(files), files)
	}
	const envSecret, fileSecret = "kafka-secret-4f1c", "redis-secret-9a2e"
	pwFile := filepath.Join(t.TempDir(), "redis-password")
	if err := os.WriteFile(pwFile, []byte(fileSecret+"\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	for _, f := range files {
		t.Run(filepath.Base(f), func(t *testing.T) {
			raw, err := os.ReadFile(f)
			if err != nil {
				t.Fatal(err)
			}
			env := map[string]string{}
			if bytes.Contains(raw, []byte("password_env: KAFKA_SASL_PASSWORD")) {
				env["KAFKA_SASL_PASSWORD"] = envSecret
			}
			if bytes.Contains(raw, []byte("password_file: /run/secrets/")) {
				env["FRESHET_REDIS_PASSWORD_FILE"] = pwFile
			}
			p := start(t, env, "run", "-check", "-config", f)
			code, sig := p.wait(procTimeout)
			out := p.stdout.String()
			if code != 0 || sig {
				t.Fatalf("exit code %d (signaled %v); stderr:\n%s", code, sig, p.stderrText())
			}
			if all := out + p.stderrText(); strings.Contains(all, envSecret) || strings.Contains(all, fileSecret) {
				t.Fatalf("a secret was printed:\n%s", all)
			}
			// The dump is itself a valid configuration (the secrets are
			// named, not included, so it resolves the same way).
			if _, err := config.Parse([]byte(out), "dump of "+filepath.Base(f)); err != nil {
				t.Fatalf("the -check dump does not parse back: %v\n%s", err, out)
			}
		})
	}
}

// badValueLines reads a JSON-lines events file independently of the stream
// package (encoding/json) and returns the line numbers of the events whose
// value lies outside [lo, hi], and the total number of lines.
func badValueLines(t *testing.T, path string, lo, hi float64) (bad []int64, total int64) {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		total++
		var rec struct {
			Value float64 `json:"value"`
		}
		if err := json.Unmarshal(sc.Bytes(), &rec); err != nil {
			t.Fatalf("%s:%d: %v", path, total, err)
		}
		if rec.Value < lo || rec.Value > hi {
			bad = append(bad, total)
		}
	}
	return bad, total
}

// summary runs freshet in this process and returns its stdout as key/value
// pairs (the tabwriter's columns are separated by two or more spaces).
func summary(t *testing.T, args ...string) (map[string]string, string) {
	t.Helper()
	var out, errb bytes.Buffer
	if err := run(context.Background(), args, &out, &errb); err != nil {
		t.Fatalf("freshet %v: %v\n%s", args, err, errb.String())
	}
	kv := map[string]string{}
	for _, ln := range strings.Split(strings.TrimRight(out.String(), "\n"), "\n") {
		parts := regexp.MustCompile(`\s{2,}`).Split(strings.TrimSpace(ln), 2)
		if len(parts) == 2 {
			kv[parts[0]] = parts[1]
		}
	}
	return kv, out.String()
}

func atoi(t *testing.T, s string) int64 {
	t.Helper()
	n, err := strconv.ParseInt(s, 10, 64)
	if err != nil {
		t.Fatalf("%q: %v", s, err)
	}
	return n
}

const curveHeader = "events,rmse_fading,mae_fading,rmse_window,mae_window,recall_fading,recall_window,cold_share,ph_statistic,alarms"

// readCurve reads a curve CSV: the header and the rows as numbers.
func readCurve(t *testing.T, path string) [][]float64 {
	t.Helper()
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimRight(string(raw), "\n"), "\n")
	if lines[0] != curveHeader {
		t.Fatalf("curve header %q, want %q", lines[0], curveHeader)
	}
	var rows [][]float64
	for i, ln := range lines[1:] {
		cells := strings.Split(ln, ",")
		if len(cells) != 10 {
			t.Fatalf("curve row %d has %d cells: %q", i+1, len(cells), ln)
		}
		row := make([]float64, len(cells))
		for j, c := range cells {
			if row[j], err = strconv.ParseFloat(c, 64); err != nil {
				t.Fatalf("curve row %d cell %d: %v", i+1, j, err)
			}
		}
		rows = append(rows, row)
	}
	return rows
}

// TestReplayRatings replays the shared ratings sample (generated on a
// half-star scale 0.5..5) with the default 1..5 scale: the half-star-0.5
// ratings are rejected, one line each in the rejects file, and the rest are
// applied. The curve follows its sampling rule.
func TestReplayRatings(t *testing.T) {
	file := filepath.Join(eventsDir, "podcast-ratings-seed1.jsonl")
	bad, total := badValueLines(t, file, 1, 5)
	if len(bad) == 0 {
		t.Fatal("the sample has no out-of-scale rating; the reject checks would be empty")
	}
	dir := t.TempDir()
	rejects := filepath.Join(dir, "rejects.jsonl")
	curve1, curve500 := filepath.Join(dir, "every1.csv"), filepath.Join(dir, "every500.csv")

	kv, out := summary(t, "replay", "-file", file, "-curve", curve1, "-every", "1", "-rejects", rejects)
	applied, rejected := atoi(t, kv["events applied"]), atoi(t, kv["records rejected"])
	if applied != total-int64(len(bad)) || rejected != int64(len(bad)) {
		t.Fatalf("applied %d, rejected %d; the file has %d lines, %d out of scale:\n%s", applied, rejected, total, len(bad), out)
	}
	if kv["mode"] != "explicit, rank 32" {
		t.Errorf("mode line %q", kv["mode"])
	}

	// One reject line per bad record, naming its line and the field.
	raw, err := os.ReadFile(rejects)
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimRight(string(raw), "\n"), "\n")
	if len(lines) != len(bad) {
		t.Fatalf("%d reject lines, want %d", len(lines), len(bad))
	}
	for i, ln := range lines {
		var r struct {
			Where, Field, Reason string
			Line                 int64
		}
		if err := json.Unmarshal([]byte(ln), &r); err != nil {
			t.Fatalf("reject line %d: %v", i+1, err)
		}
		if r.Line != bad[i] || r.Where != fmt.Sprintf("line %d", bad[i]) || r.Field != "value" || r.Reason == "" {
			t.Errorf("reject %d: %s; want line %d, field value", i+1, ln, bad[i])
		}
	}

	// -every 1: a row at every batch boundary that applied something, the
	// last at the total; each batch is at most 256 records.
	rows := readCurve(t, curve1)
	prev := 0.0
	for i, r := range rows {
		if r[0] <= prev || r[0]-prev > demoBatch {
			t.Fatalf("row %d at %v events after %v: want an increase of 1..%d", i, r[0], prev, demoBatch)
		}
		if r[5] != 0 || r[6] != 0 {
			t.Fatalf("row %d: recall columns %v, %v in explicit mode", i, r[5], r[6])
		}
		prev = r[0]
	}
	last := rows[len(rows)-1]
	if int64(last[0]) != applied {
		t.Fatalf("last curve row at %v events, applied %d", last[0], applied)
	}
	var fading, window float64
	if _, err := fmt.Sscanf(kv["RMSE fading / window"], "%f / %f", &fading, &window); err != nil {
		t.Fatalf("RMSE line %q: %v", kv["RMSE fading / window"], err)
	}
	// The summary prints 4 decimals: agree to half a unit of the last.
	if d1, d2 := last[1]-fading, last[3]-window; d1 > 5e-5 || d1 < -5e-5 || d2 > 5e-5 || d2 < -5e-5 {
		t.Fatalf("last curve row RMSE %v / %v, summary %v / %v", last[1], last[3], fading, window)
	}

	// -every 500: the first boundary, then the first boundary at or past
	// each next multiple of 500, and none after the last multiple passed.
	summary(t, "replay", "-file", file, "-curve", curve500, "-every", "500")
	rows = readCurve(t, curve500)
	if rows[0][0] > demoBatch {
		t.Fatalf("first row at %v events, want the first batch boundary", rows[0][0])
	}
	for i := 1; i < len(rows); i++ {
		next := (int64(rows[i-1][0])/500 + 1) * 500
		if e := int64(rows[i][0]); e < next || e >= next+demoBatch {
			t.Fatalf("row %d at %d events; want the first boundary at or after %d", i, e, next)
		}
	}
	if next := (int64(rows[len(rows)-1][0])/500 + 1) * 500; applied >= next {
		t.Fatalf("no row for the %d mark (applied %d)", next, applied)
	}

	// On the file's own half-star scale every line is applied.
	cfg := filepath.Join(dir, "halfstar.yaml")
	if err := os.WriteFile(cfg, []byte("model:\n  rating_min: 0.5\n  rating_max: 5\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	kv, out = summary(t, "replay", "-config", cfg, "-file", file)
	if atoi(t, kv["events applied"]) != total || atoi(t, kv["records rejected"]) != 0 {
		t.Fatalf("half-star scale: %s", out)
	}
}

// TestReplayMixedCSV replays the hand-written CSV sample with the default
// 1..5 scale. Its 13 data lines (after the header) are, by line number:
//
//	2  ok            4.5
//	3  ok            3, RFC 3339 time
//	4  bad value     7 is above 5
//	5  bad value     0.5 is below 1 (quoted user with a comma)
//	6  bad user      empty
//	7  bad time      "yesterday"
//	8  blank line    skipped, not a record
//	9  bad record    4 fields where the header has 6
//	10 erase_user    not a rating: counted as an erasure, not applied
//	11 ok            kind "interaction"
//	12 bad kind      "mute"
//	13 ok            3.5
//
// so 4 ratings are applied and 6 records rejected.
func TestReplayMixedCSV(t *testing.T) {
	file := filepath.Join(eventsDir, "mixed.csv")
	rejects := filepath.Join(t.TempDir(), "rejects.jsonl")
	kv, out := summary(t, "replay", "-file", file, "-rejects", rejects)
	if atoi(t, kv["events applied"]) != 4 || atoi(t, kv["records rejected"]) != 6 {
		t.Fatalf("want 4 applied and 6 rejected:\n%s", out)
	}
	if kv["users, items"] != "3, 3" {
		t.Errorf("users, items %q; want 3, 3 (listeners 000002, 000005, 000006 after the erasure of 000001; shows 0001, 0002, 0004)", kv["users, items"])
	}
	want := []struct {
		line  int64
		field string
	}{{4, "value"}, {5, "value"}, {6, "user"}, {7, "time"}, {9, ""}, {12, "kind"}}
	raw, err := os.ReadFile(rejects)
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimRight(string(raw), "\n"), "\n")
	if len(lines) != len(want) {
		t.Fatalf("%d reject lines, want %d:\n%s", len(lines), len(want), raw)
	}
	for i, ln := range lines {
		var r struct {
			Where, Field, Reason, Raw string
			Line                      int64
		}
		if err := json.Unmarshal([]byte(ln), &r); err != nil {
			t.Fatalf("reject line %d: %v", i+1, err)
		}
		if r.Line != want[i].line || r.Where != fmt.Sprintf("line %d", want[i].line) || r.Field != want[i].field || r.Reason == "" || r.Raw == "" {
			t.Errorf("reject %d: %s; want line %d, field %q, a reason and the raw record", i+1, ln, want[i].line, want[i].field)
		}
	}
}

// TestGenerateDecodes writes the demo with generate and decodes the output
// with the stream package's JSON decoder, line by line.
func TestGenerateDecodes(t *testing.T) {
	const n = 1234
	out := filepath.Join(t.TempDir(), "demo.jsonl")
	var stdout, stderr bytes.Buffer
	if err := run(context.Background(), []string{"generate", "-events", strconv.Itoa(n), "-o", out}, &stdout, &stderr); err != nil {
		t.Fatalf("generate: %v\n%s", err, stderr.String())
	}
	f, err := os.Open(out)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	// The default model scale: every generated rating must pass it.
	dec := stream.NewJSONDecoder(stream.DecodeOptions{MinValue: 1, MaxValue: 5, RequireTime: true})
	var b stream.Batch
	sc := bufio.NewScanner(f)
	lines := 0
	for sc.Scan() {
		lines++
		if err := dec.Decode(sc.Bytes(), &b); err != nil {
			t.Fatalf("line %d: %v", lines, err)
		}
	}
	if lines != n || b.Len() != n {
		t.Fatalf("%d lines, %d events decoded; want %d", lines, b.Len(), n)
	}
	for i := 1; i < b.Len(); i++ {
		if b.Events[i].Time < b.Events[i-1].Time {
			t.Fatalf("event %d goes back in time", i)
		}
	}
}

// TestReplayDeterministic replays the same file twice, in both modes: the
// summaries (but for the elapsed time) and the curves are identical.
func TestReplayDeterministic(t *testing.T) {
	dir := t.TempDir()
	implicit := filepath.Join(dir, "implicit.yaml")
	if err := os.WriteFile(implicit, []byte("model:\n  mode: implicit\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct{ name, file, cfg string }{
		{"explicit", "podcast-ratings-seed1.jsonl", ""},
		{"implicit", "podcast-plays-seed2.jsonl", implicit},
	} {
		t.Run(c.name, func(t *testing.T) {
			var outs, curves [2]string
			for k := range 2 {
				curve := filepath.Join(dir, fmt.Sprintf("%s-%d.csv", c.name, k))
				args := []string{"replay", "-file", filepath.Join(eventsDir, c.file), "-curve", curve, "-every", "100"}
				if c.cfg != "" {
					args = append(args, "-config", c.cfg)
				}
				_, out := summary(t, args...)
				var keep []string
				for _, ln := range strings.Split(out, "\n") {
					if !strings.HasPrefix(ln, "elapsed") {
						keep = append(keep, ln)
					}
				}
				outs[k] = strings.Join(keep, "\n")
				raw, err := os.ReadFile(curve)
				if err != nil {
					t.Fatal(err)
				}
				curves[k] = string(raw)
			}
			if outs[0] != outs[1] {
				t.Fatalf("summaries differ:\n%s\n---\n%s", outs[0], outs[1])
			}
			if curves[0] != curves[1] {
				t.Fatalf("curves differ")
			}
			if len(strings.Split(curves[0], "\n")) < 5 {
				t.Fatalf("curve too short to compare:\n%s", curves[0])
			}
			if c.name == "implicit" && !strings.Contains(outs[0], "recall@10") {
				t.Fatalf("implicit summary without recall:\n%s", outs[0])
			}
		})
	}
}
