package stream

import (
	"bufio"
	"bytes"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"sync"
	"unicode/utf8"
)

// RejectFile is a Rejecter that appends one JSON object per line for each
// record set aside:
//
//	{"where":"line 17","partition":0,"offset":812,"line":17,"field":"value","reason":"not finite","raw":"..."}
//
// raw holds the record's bytes as a JSON string when they are valid UTF-8;
// otherwise raw is omitted and raw_base64 holds them in standard base64, so
// that no byte is lost. field is omitted when the record was not parseable at
// all. The file is opened for appending and created with mode 0600 (it may
// hold personal data).
//
// A RejectFile is safe for concurrent use: a source's reader may reject
// records while an erasure request calls RemoveID.
type RejectFile struct {
	path string
	mu   sync.Mutex
	f    *os.File
	n    int64
	line []byte
	err  error // sticky after Close
}

// rejectLine is the on-disk form of one rejected record.
type rejectLine struct {
	Where     string `json:"where"`
	Partition int32  `json:"partition"`
	Offset    int64  `json:"offset"`
	Line      int64  `json:"line,omitempty"`
	Field     string `json:"field,omitempty"`
	Reason    string `json:"reason"`
	Raw       string `json:"raw,omitempty"`
	RawBase64 string `json:"raw_base64,omitempty"`
}

// ErrClosed is returned by a RejectFile used after Close.
var ErrClosed = errors.New("stream: rejects file closed")

var _ Rejecter = (*RejectFile)(nil)

// OpenRejectFile opens (creating it if needed) the rejects file at path for
// appending.
func OpenRejectFile(path string) (*RejectFile, error) {
	f, err := os.OpenFile(path, os.O_WRONLY|os.O_APPEND|os.O_CREATE, 0o600)
	if err != nil {
		return nil, fmt.Errorf("open rejects file: %w", err)
	}
	return &RejectFile{path: path, f: f}, nil
}

// Path returns the file's path.
func (rf *RejectFile) Path() string { return rf.path }

// Reject appends one line for r. The line is written with a single write
// call, so it is never interleaved with another writer of the file.
func (rf *RejectFile) Reject(r Rejected) error {
	rl := rejectLine{Partition: r.Partition, Offset: r.Offset, Line: r.Line}
	if r.Err != nil {
		rl.Where, rl.Field, rl.Reason = r.Err.Where, r.Err.Field, r.Err.Reason
	}
	if utf8.Valid(r.Raw) {
		rl.Raw = string(r.Raw)
	} else {
		rl.RawBase64 = base64.StdEncoding.EncodeToString(r.Raw)
	}
	js, err := json.Marshal(&rl)
	if err != nil {
		return fmt.Errorf("encode reject: %w", err)
	}
	rf.mu.Lock()
	defer rf.mu.Unlock()
	if rf.f == nil {
		return ErrClosed
	}
	rf.line = append(append(rf.line[:0], js...), '\n')
	if _, err := rf.f.Write(rf.line); err != nil {
		return fmt.Errorf("write rejects file %s: %w", rf.path, err)
	}
	rf.n++
	return nil
}

// Count returns the number of lines this RejectFile has written since it was
// opened (lines already in the file, and lines RemoveID dropped, are not
// counted or subtracted).
func (rf *RejectFile) Count() int64 {
	rf.mu.Lock()
	defer rf.mu.Unlock()
	return rf.n
}

// Sync flushes the file to stable storage.
func (rf *RejectFile) Sync() error {
	rf.mu.Lock()
	defer rf.mu.Unlock()
	if rf.f == nil {
		return ErrClosed
	}
	return rf.f.Sync()
}

// Close syncs and closes the file. It is safe to call more than once.
func (rf *RejectFile) Close() error {
	rf.mu.Lock()
	defer rf.mu.Unlock()
	if rf.f == nil {
		return nil
	}
	err := errors.Join(rf.f.Sync(), rf.f.Close())
	rf.f = nil
	return err
}

// RemoveID rewrites the file without the lines whose raw record names id as
// its user or item, and returns how many lines it dropped (privacy erasure).
//
// A line is dropped when any double-quoted string in its raw record equals
// id after JSON unescaping (so "l\u0069stener-17" matches listener-17, even
// in a record that is not valid JSON as a whole), or when id occurs in the
// raw bytes bounded by the start or end of the record, a quote, a comma, a
// tab, a space or a line ending (which covers CSV and TSV fields). Erring toward removal is deliberate: a
// reject that merely mentions the ID is dropped too. Lines of the file that
// are not themselves readable are kept.
//
// The rewrite is atomic: the kept lines go to a temporary file in the same
// directory, which is synced, renamed over the original, and the directory is
// synced; then appending resumes on the new file.
func (rf *RejectFile) RemoveID(id []byte) (removed int, err error) {
	if len(id) == 0 {
		return 0, errors.New("stream: remove from rejects file: empty id")
	}
	rf.mu.Lock()
	defer rf.mu.Unlock()
	if rf.f == nil {
		return 0, ErrClosed
	}
	if err := rf.f.Sync(); err != nil {
		return 0, fmt.Errorf("sync rejects file: %w", err)
	}
	in, err := os.Open(rf.path)
	if err != nil {
		return 0, fmt.Errorf("read rejects file: %w", err)
	}
	defer in.Close()
	dir := filepath.Dir(rf.path)
	tmp, err := os.CreateTemp(dir, filepath.Base(rf.path)+".*.tmp")
	if err != nil {
		return 0, fmt.Errorf("rewrite rejects file: %w", err)
	}
	tmpName := tmp.Name()
	defer func() {
		if err != nil {
			tmp.Close()
			os.Remove(tmpName)
		}
	}()
	if err = tmp.Chmod(0o600); err != nil {
		return 0, fmt.Errorf("rewrite rejects file: %w", err)
	}
	w := bufio.NewWriter(tmp)
	r := bufio.NewReader(in)
	for {
		line, rerr := r.ReadBytes('\n')
		if len(line) > 0 {
			if rejectNames(line, id) {
				removed++
			} else if _, err = w.Write(line); err != nil {
				return 0, fmt.Errorf("rewrite rejects file: %w", err)
			}
		}
		if rerr != nil {
			if !errors.Is(rerr, io.EOF) {
				err = fmt.Errorf("read rejects file: %w", rerr)
				return 0, err
			}
			break
		}
	}
	if err = w.Flush(); err != nil {
		return 0, fmt.Errorf("rewrite rejects file: %w", err)
	}
	if err = tmp.Sync(); err != nil {
		return 0, fmt.Errorf("sync rewritten rejects file: %w", err)
	}
	if err = tmp.Close(); err != nil {
		return 0, fmt.Errorf("rewrite rejects file: %w", err)
	}
	if err = os.Rename(tmpName, rf.path); err != nil {
		return 0, fmt.Errorf("replace rejects file: %w", err)
	}
	if err = syncDir(dir); err != nil {
		return removed, err
	}
	// Appends must go to the new file, not the unlinked old one.
	f, err := os.OpenFile(rf.path, os.O_WRONLY|os.O_APPEND|os.O_CREATE, 0o600)
	if err != nil {
		return removed, fmt.Errorf("reopen rejects file: %w", err)
	}
	old := rf.f
	rf.f = f
	if cerr := old.Close(); cerr != nil {
		return removed, fmt.Errorf("close old rejects file: %w", cerr)
	}
	return removed, nil
}

func syncDir(dir string) error {
	d, err := os.Open(dir)
	if err != nil {
		return fmt.Errorf("sync directory %s: %w", dir, err)
	}
	return errors.Join(d.Sync(), d.Close())
}

// rejectNames reports whether a line of the rejects file holds a raw record
// that names id (see RemoveID).
func rejectNames(line, id []byte) bool {
	var rl rejectLine
	if err := json.Unmarshal(line, &rl); err != nil {
		return false
	}
	raw := []byte(rl.Raw)
	if rl.RawBase64 != "" {
		b, err := base64.StdEncoding.DecodeString(rl.RawBase64)
		if err != nil {
			return false
		}
		raw = b
	}
	if quotedStringEquals(raw, id) {
		return true
	}
	return containsBounded(raw, id)
}

// quotedStringEquals reports whether some double-quoted JSON string in raw
// decodes to id. Malformed strings are passed over.
func quotedStringEquals(raw, id []byte) bool {
	d := NewJSONDecoder(DecodeOptions{})
	d.p = jsonParser{b: raw}
	for {
		j := bytes.IndexByte(raw[d.p.i:], '"')
		if j < 0 {
			return false
		}
		at := d.p.i + j
		d.p.i = at
		d.scratch = d.scratch[:0]
		s, err := d.str("")
		if err != nil {
			d.p.i = at + 1
			continue
		}
		if bytes.Equal(s, id) {
			return true
		}
	}
}

// containsBounded reports whether id occurs in raw with a delimiter (or the
// edge of raw) on both sides.
func containsBounded(raw, id []byte) bool {
	bound := func(c byte) bool {
		switch c {
		case '"', ',', '\t', ' ', '\r', '\n':
			return true
		}
		return false
	}
	for off := 0; off <= len(raw)-len(id); {
		j := bytes.Index(raw[off:], id)
		if j < 0 {
			return false
		}
		s := off + j
		e := s + len(id)
		if (s == 0 || bound(raw[s-1])) && (e == len(raw) || bound(raw[e])) {
			return true
		}
		off = s + 1
	}
	return false
}

// whereLine formats the location of a line of a file.
func whereLine(line int64) string { return "line " + strconv.FormatInt(line, 10) }
