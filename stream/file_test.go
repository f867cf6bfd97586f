package stream

import (
	"bytes"
	"compress/gzip"
	"context"
	"encoding/json"
	"errors"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"
)

// kept is an event copied out of its batch.
type kept struct {
	User, Item, EventID string
	Value               float64
	Time                int64
	Kind                Kind
	Offset              int64
}

func keep(ev *Event) kept {
	return kept{string(ev.User), string(ev.Item), string(ev.EventID), ev.Value, ev.Time, ev.Kind, ev.Offset}
}

// drain reads src to io.EOF and returns the events and each batch's position.
func drain(t *testing.T, src Source) (evs []kept, pos []Position, rejected int) {
	t.Helper()
	ctx := context.Background()
	for {
		b, err := src.Next(ctx)
		if errors.Is(err, io.EOF) {
			return evs, pos, rejected
		}
		if err != nil {
			t.Fatalf("Next: %v", err)
		}
		for i := range b.Events {
			evs = append(evs, keep(&b.Events[i]))
		}
		pos = append(pos, b.Pos.Clone())
		rejected += b.Rejected
	}
}

func writeFile(t *testing.T, name, content string) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), name)
	if err := os.WriteFile(p, []byte(content), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

func gzipFile(t *testing.T, name, content string) string {
	t.Helper()
	var buf bytes.Buffer
	zw := gzip.NewWriter(&buf)
	zw.Write([]byte(content))
	zw.Close()
	p := filepath.Join(t.TempDir(), name)
	if err := os.WriteFile(p, buf.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

func open(t *testing.T, o FileOptions, from Position) *FileSource {
	t.Helper()
	s, err := OpenFile(o, from)
	if err != nil {
		t.Fatalf("OpenFile: %v", err)
	}
	t.Cleanup(func() { s.Close() })
	return s
}

const sampleJSONL = `{"user":"listener-1","item":"show-1","value":4,"time":1000}
{"user":"listener-2","item":"show-1","value":9,"time":1001}

{"user":"listener-2","item":"show-2","value":3.5,"time":1002}
not json at all
{"user":"listener-3","item":"show-3","value":2,"time":1003}`

func TestFileJSONLWithRejects(t *testing.T) {
	dir := t.TempDir()
	rf, err := OpenRejectFile(filepath.Join(dir, "rejects.jsonl"))
	if err != nil {
		t.Fatal(err)
	}
	defer rf.Close()
	p := writeFile(t, "events.jsonl", sampleJSONL)
	s := open(t, FileOptions{Path: p, Decode: DecodeOptions{MinValue: 0.5, MaxValue: 5}, Rejects: rf}, Position{})
	evs, pos, rejected := drain(t, s)
	if len(evs) != 3 || rejected != 2 {
		t.Fatalf("got %d events and %d rejects, want 3 and 2", len(evs), rejected)
	}
	if evs[1].User != "listener-2" || evs[1].Item != "show-2" || evs[1].Value != 3.5 {
		t.Fatalf("second event %+v", evs[1])
	}
	// Offsets are the byte offsets of each line.
	for _, ev := range evs {
		if !strings.HasPrefix(sampleJSONL[ev.Offset:], `{"user":"`+ev.User) {
			t.Fatalf("event %+v: offset does not point at its line", ev)
		}
	}
	last := pos[len(pos)-1]
	if last.Source != "file" || last.Path != p || last.Offset != int64(len(sampleJSONL)) || last.Line != 7 {
		t.Fatalf("final position %+v, want offset %d line 7", last, len(sampleJSONL))
	}
	if rf.Count() != 2 {
		t.Fatalf("rejects file counted %d, want 2", rf.Count())
	}
	lines := readRejects(t, rf.Path())
	if lines[0].Where != "line 2" || lines[0].Field != "value" || lines[0].Line != 2 || !strings.Contains(lines[0].Raw, `"value":9`) {
		t.Fatalf("first reject %+v", lines[0])
	}
	if lines[1].Where != "line 5" || lines[1].Field != "" || lines[1].Raw != "not json at all" ||
		lines[1].Offset != int64(strings.Index(sampleJSONL, "not json")) {
		t.Fatalf("second reject %+v", lines[1])
	}
}

func readRejects(t *testing.T, path string) []rejectLine {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var out []rejectLine
	for _, l := range bytes.Split(bytes.TrimSpace(data), []byte("\n")) {
		if len(l) == 0 {
			continue
		}
		var rl rejectLine
		if err := json.Unmarshal(l, &rl); err != nil {
			t.Fatalf("rejects line %q: %v", l, err)
		}
		out = append(out, rl)
	}
	return out
}

func TestFileFormats(t *testing.T) {
	csv := "user,item,value,time\r\nlistener-1,show-1,4,1000\r\n\"listener,2\",show-1,5,1001\r\nlistener-3,show-2,x,1002\r\n"
	tsv := "time\tuser\titem\n1000\tlistener-1\tshow-1\n1001\tlistener,2\tshow-1\n"
	tests := []struct {
		name, file, content string
		gz                  bool
		opts                FileOptions
		events, rejects     int
	}{
		{"csv crlf", "e.csv", csv, false, FileOptions{}, 2, 1},
		{"csv gzip by magic", "e.csv.gz", csv, true, FileOptions{}, 2, 1},
		{"csv gzip without extension", "e.data", csv, true, FileOptions{Format: "csv"}, 2, 1},
		{"tsv implicit", "e.tsv", tsv, false, FileOptions{Decode: DecodeOptions{Implicit: true}}, 2, 0},
		{"jsonl with byte order mark", "e.jsonl", "\xef\xbb\xbf" + sampleJSONL, false, FileOptions{Decode: DecodeOptions{MaxValue: 5}}, 3, 2},
		{"jsonl gzip", "e.jsonl.gz", sampleJSONL, true, FileOptions{Decode: DecodeOptions{MaxValue: 5}}, 3, 2},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var p string
			if tt.gz {
				p = gzipFile(t, tt.file, tt.content)
			} else {
				p = writeFile(t, tt.file, tt.content)
			}
			o := tt.opts
			o.Path = p
			evs, pos, rejected := drain(t, open(t, o, Position{}))
			if len(evs) != tt.events || rejected != tt.rejects {
				t.Fatalf("got %d events, %d rejects; want %d, %d", len(evs), rejected, tt.events, tt.rejects)
			}
			if evs[1].User != "listener,2" && evs[1].User != "listener-2" {
				t.Fatalf("second event %+v", evs[1])
			}
			if got := pos[len(pos)-1].Offset; got != int64(len(tt.content)) {
				t.Fatalf("final offset %d, want %d (decompressed length)", got, len(tt.content))
			}
		})
	}
}

func TestFileOpenErrors(t *testing.T) {
	p := writeFile(t, "e.jsonl", sampleJSONL)
	gz := gzipFile(t, "e.jsonl.gz", sampleJSONL)
	csvNoUser := writeFile(t, "e.csv", "item,value\nb,1\n")
	lineStart := int64(strings.Index(sampleJSONL, "\n") + 1)
	tests := []struct {
		name string
		opts FileOptions
		from Position
		want string
	}{
		{"no path", FileOptions{}, Position{}, "no path"},
		{"missing file", FileOptions{Path: p + ".nope", Format: "jsonl"}, Position{}, "no such file"},
		{"unknown extension", FileOptions{Path: filepath.Join(t.TempDir(), "e.txt")}, Position{}, "extension"},
		{"unknown format", FileOptions{Path: p, Format: "xml"}, Position{}, "unknown format"},
		{"follow gzip", FileOptions{Path: gz, Follow: true}, Position{}, "gzip"},
		{"header without user", FileOptions{Path: csvNoUser}, Position{}, `line 1 (header): field "user"`},
		{"foreign position", FileOptions{Path: p}, Position{Source: "kafka", Topic: "t"}, "kafka"},
		{"other file", FileOptions{Path: p}, Position{Source: "file", Path: "/x.jsonl", Offset: 3, Line: 2}, "/x.jsonl"},
		{"not at line start", FileOptions{Path: p}, Position{Source: "file", Path: p, Offset: lineStart + 3, Line: 2}, "not the start of a line"},
		{"beyond end", FileOptions{Path: p}, Position{Source: "file", Path: p, Offset: 1 << 20, Line: 9}, "offset"},
		{"beyond end gzip", FileOptions{Path: gz}, Position{Source: "file", Path: gz, Offset: 1 << 20, Line: 9}, "beyond the end"},
		{"no line number", FileOptions{Path: p}, Position{Source: "file", Path: p, Offset: lineStart}, "bad position"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			s, err := OpenFile(tt.opts, tt.from)
			if err == nil {
				s.Close()
				t.Fatalf("OpenFile succeeded, want error containing %q", tt.want)
			}
			if !strings.Contains(err.Error(), tt.want) {
				t.Fatalf("error %q, want it to contain %q", err, tt.want)
			}
		})
	}
}

// TestFileResume reads a file in small batches, then reopens it at every
// batch position and checks that exactly the remaining events follow.
func TestFileResume(t *testing.T) {
	var sb strings.Builder
	sb.WriteString("user,item,value,time\n")
	for i := range 100 {
		if i%17 == 5 {
			sb.WriteString("bad line\n")
			continue
		}
		sb.WriteString("listener-" + itoa(i) + ",show-" + itoa(i%7) + "," + itoa(1+i%5) + "," + itoa(1000+i) + "\n")
	}
	content := sb.String()
	for _, gz := range []bool{false, true} {
		p := writeFile(t, "e.csv", content)
		if gz {
			p = gzipFile(t, "e.csv", content)
		}
		o := FileOptions{Path: p, BatchSize: 7}
		all, pos, _ := drain(t, open(t, o, Position{}))
		seen := 0
		for k, at := range pos {
			// Events up to and including batch k.
			s := open(t, o, at)
			rest, _, _ := drain(t, s)
			s.Close()
			before := 0
			for _, ev := range all {
				if ev.Offset < at.Offset {
					before++
				}
			}
			if len(rest) != len(all)-before {
				t.Fatalf("gzip=%v: resume at batch %d (%s): %d events, want %d", gz, k, at, len(rest), len(all)-before)
			}
			for i := range rest {
				if rest[i] != all[before+i] {
					t.Fatalf("gzip=%v: resume at %s: event %d is %+v, want %+v", gz, at, i, rest[i], all[before+i])
				}
			}
			seen++
		}
		if seen < 10 {
			t.Fatalf("only %d batches", seen)
		}
	}
}

func itoa(i int) string { return strconv.Itoa(i) }

func TestFileLongLine(t *testing.T) {
	long := `{"user":"a","item":"b","value":1,"pad":"` + strings.Repeat("x", MaxLineLen+10) + `"}`
	content := `{"user":"a","item":"b","value":1}` + "\n" + long + "\n" + `{"user":"c","item":"d","value":2}` + "\n" + long
	for _, gz := range []bool{false, true} {
		p := writeFile(t, "e.jsonl", content)
		if gz {
			p = gzipFile(t, "e.jsonl", content)
		}
		var rec recorder
		evs, pos, rejected := drain(t, open(t, FileOptions{Path: p, Rejects: &rec}, Position{}))
		if len(evs) != 2 || rejected != 2 || evs[1].User != "c" {
			t.Fatalf("gzip=%v: %d events %+v, %d rejects; want 2 events and 2 rejects", gz, len(evs), evs, rejected)
		}
		if rec.got[0].Line != 2 || !strings.Contains(rec.got[0].Err.Reason, "longer than") || len(rec.got[0].Raw) != maxRejectRaw {
			t.Fatalf("reject %+v", rec.got[0].Err)
		}
		if rec.got[1].Line != 4 || rec.got[1].Offset != int64(len(content)-len(long)) {
			t.Fatalf("last reject at line %d offset %d", rec.got[1].Line, rec.got[1].Offset)
		}
		if last := pos[len(pos)-1]; last.Offset != int64(len(content)) || last.Line != 5 {
			t.Fatalf("final position %+v", last)
		}
	}
}

type recorder struct{ got []Rejected }

func (r *recorder) Reject(x Rejected) error {
	x.Raw = append([]byte(nil), x.Raw...)
	r.got = append(r.got, x)
	return nil
}

func TestFileFollow(t *testing.T) {
	p := writeFile(t, "live.jsonl", `{"user":"a","item":"b","value":1,"time":1}`+"\n")
	s := open(t, FileOptions{Path: p, Follow: true, PollInterval: 5 * time.Millisecond}, Position{})
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	wait := func(n int) []kept {
		var got []kept
		for len(got) < n {
			b, err := s.Next(ctx)
			if err != nil {
				t.Fatalf("Next: %v (have %d of %d events)", err, len(got), n)
			}
			for i := range b.Events {
				got = append(got, keep(&b.Events[i]))
			}
		}
		return got
	}
	if got := wait(1); got[0].User != "a" {
		t.Fatalf("first event %+v", got)
	}
	// An idle following source hands out empty batches.
	b, err := s.Next(ctx)
	if err != nil || b.Len() != 0 {
		t.Fatalf("idle Next = %v, %v; want an empty batch", b, err)
	}
	f, err := os.OpenFile(p, os.O_APPEND|os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	// A partial line is held back until its newline arrives.
	f.WriteString(`{"user":"c","item":"d",`)
	time.Sleep(30 * time.Millisecond)
	f.WriteString(`"value":2,"time":2}` + "\n" + `{"user":"e","item":"f","value":3,"time":3}` + "\n")
	got := wait(2)
	if got[0].User != "c" || got[1].User != "e" {
		t.Fatalf("appended events %+v", got)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatal("second Close:", err)
	}
}

func TestFileNextHonoursContext(t *testing.T) {
	p := writeFile(t, "live.jsonl", "")
	s := open(t, FileOptions{Path: p, Follow: true}, Position{})
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := s.Next(ctx); !errors.Is(err, context.Canceled) {
		// The reader may have an empty batch ready; the next call must fail.
		if _, err := s.Next(ctx); !errors.Is(err, context.Canceled) {
			t.Fatalf("Next with a cancelled context: %v", err)
		}
	}
}

func TestFileFollowDetectsTruncation(t *testing.T) {
	p := writeFile(t, "live.jsonl", `{"user":"a","item":"b","value":1}`+"\n"+`{"user":"c","item":"d","value":1}`+"\n")
	s := open(t, FileOptions{Path: p, Follow: true, PollInterval: 5 * time.Millisecond}, Position{})
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	if b, err := s.Next(ctx); err != nil || b.Len() != 2 {
		t.Fatalf("Next = %v, %v", b, err)
	}
	if err := os.Truncate(p, 5); err != nil {
		t.Fatal(err)
	}
	for {
		_, err := s.Next(ctx)
		if err == nil {
			continue // empty batches until the reader looks again
		}
		if !strings.Contains(err.Error(), "shrank") {
			t.Fatalf("Next after truncation: %v, want an error saying the file shrank", err)
		}
		break
	}
}
