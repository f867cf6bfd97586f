package stream

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"time"
)

// Defaults for FileOptions.
const (
	// DefaultBatchSize is the number of records a source puts in one batch.
	DefaultBatchSize = 256
	// DefaultPollInterval is how often a following file source looks for
	// appended lines.
	DefaultPollInterval = 200 * time.Millisecond
	// MaxLineLen is the longest line a file source decodes, in bytes without
	// the line ending. A longer line is rejected as a whole.
	MaxLineLen = 1 << 20
	// maxRejectRaw bounds the raw bytes kept for a rejected over-long line.
	maxRejectRaw = 4096
	// idleEmit is how long a following source waits, with nothing new,
	// before it hands out an empty batch (the Source contract asks for one at
	// least once per second).
	idleEmit = 500 * time.Millisecond
)

// FileOptions configure a file source. A zero field takes the default named
// in its comment.
type FileOptions struct {
	// Path is the file to replay. Required.
	Path string
	// Format is "jsonl" (one JSON object per line), "csv" or "tsv" (a header
	// line, then one record per line). If empty it is taken from the
	// extension, ignoring a final ".gz": .jsonl, .ndjson and .json are jsonl,
	// .csv is csv, .tsv and .tab are tsv.
	Format string
	// Decode says how records are validated.
	Decode DecodeOptions
	// BatchSize is the most records (accepted plus rejected) in one batch.
	// If zero, DefaultBatchSize is used.
	BatchSize int
	// Follow keeps the source open at the end of the file and polls for
	// appended lines, as tail -f does; Next then never returns io.EOF. A
	// final line without a line ending is not read until its ending arrives.
	// Follow cannot be used with a gzip file.
	Follow bool
	// PollInterval is the polling period in follow mode. If zero,
	// DefaultPollInterval is used. Polls are at most 500 ms apart whatever
	// the setting, so that an idle source still hands out a batch in time.
	PollInterval time.Duration
	// Rejects receives the records that fail to decode. If nil they are
	// only counted (Batch.Rejected).
	Rejects Rejecter
}

// FileSource replays a file of events: JSON lines, CSV or TSV, optionally
// gzip-compressed (detected by its magic bytes, whatever the name). It
// implements Source.
//
// Its Position holds the path, the byte offset of the next line and that
// line's number (from 1; the header of a CSV or TSV file is line 1). Offsets
// count bytes of the decompressed stream: resuming a plain file seeks there,
// resuming a gzip file decompresses and discards the bytes before it. Lines end
// with "\n" or "\r\n"; a UTF-8 byte order mark at the start is ignored;
// blank lines are skipped; a line longer than MaxLineLen
// is rejected with its first 4 KiB as the raw record.
//
// A reader goroutine decodes the next batch while the caller works on the
// current one (two batches alternate); Close stops it.
type FileSource struct {
	opts   FileOptions
	files  []*os.File
	lr     *lineReader
	dec    Decoder
	stat   func() (int64, error) // size of the file, in follow mode
	pos    Position              // next record (reader goroutine only)
	out    chan fileResult
	free   chan *Batch
	stop   chan struct{}
	done   chan struct{}
	once   sync.Once
	held   *Batch
	err    error // sticky error from Next
	commit Position
}

type fileResult struct {
	b   *Batch
	err error
}

var _ Source = (*FileSource)(nil)

// OpenFile opens a file source that resumes at from. A zero from starts at
// the beginning; otherwise from must be a file Position for the same path
// (compared after filepath.Clean), as found in Batch.Pos.
func OpenFile(opts FileOptions, from Position) (*FileSource, error) {
	if opts.Path == "" {
		return nil, errors.New("stream: open file source: no path")
	}
	if opts.BatchSize == 0 {
		opts.BatchSize = DefaultBatchSize
	}
	if opts.BatchSize < 0 {
		return nil, fmt.Errorf("stream: open file source: batch size %d is negative", opts.BatchSize)
	}
	if opts.PollInterval <= 0 {
		opts.PollInterval = DefaultPollInterval
	}
	format := opts.Format
	if format == "" {
		format = formatFromExt(opts.Path)
		if format == "" {
			return nil, fmt.Errorf("stream: open file source %s: cannot tell the format from the extension; set the format to jsonl, csv or tsv", opts.Path)
		}
	}
	var sep byte
	switch format {
	case "jsonl":
	case "csv":
		sep = ','
	case "tsv":
		sep = '\t'
	default:
		return nil, fmt.Errorf("stream: open file source %s: unknown format %q (want jsonl, csv or tsv)", opts.Path, format)
	}
	start := Position{Source: "file", Path: opts.Path, Line: 1}
	if !from.IsZero() {
		if from.Source != "file" {
			return nil, fmt.Errorf("stream: open file source %s: position is for a %s source", opts.Path, from.Source)
		}
		if filepath.Clean(from.Path) != filepath.Clean(opts.Path) {
			return nil, fmt.Errorf("stream: open file source %s: position is for file %s", opts.Path, from.Path)
		}
		if from.Offset < 0 || (from.Offset > 0 && from.Line < 2) {
			return nil, fmt.Errorf("stream: open file source %s: bad position (offset %d, line %d)", opts.Path, from.Offset, from.Line)
		}
		if from.Offset > 0 {
			start.Offset, start.Line = from.Offset, from.Line
		}
	}

	s := &FileSource{
		opts: opts,
		out:  make(chan fileResult),
		free: make(chan *Batch, 2),
		stop: make(chan struct{}),
		done: make(chan struct{}),
		pos:  start,
	}
	ok := false
	defer func() {
		if !ok {
			for _, f := range s.files {
				f.Close()
			}
		}
	}()
	r, gz, err := s.open()
	if err != nil {
		return nil, err
	}
	if gz && opts.Follow {
		return nil, fmt.Errorf("stream: open file source %s: follow mode cannot read a gzip file", opts.Path)
	}

	if sep != 0 {
		// Delimited: the header is line 1, read from the start of the file.
		hr := r
		if start.Offset > 0 {
			if hr, _, err = s.open(); err != nil {
				return nil, err
			}
		}
		hlr := newLineReader(hr, 0)
		header, _, st, err := hlr.next(false)
		if err != nil {
			return nil, fmt.Errorf("stream: open file source %s: read header: %w", opts.Path, err)
		}
		if st == lineEOF || st == lineTooLong {
			return nil, fmt.Errorf("stream: open file source %s: line 1: no header line", opts.Path)
		}
		dd, err := NewDelimitedDecoder(header, sep, opts.Decode)
		if err != nil {
			var de *DecodeError
			if errors.As(err, &de) {
				de.Where = "line 1 (header)"
			}
			return nil, fmt.Errorf("stream: open file source %s: %w", opts.Path, err)
		}
		s.dec = dd
		hend := hlr.base + int64(hlr.start)
		if start.Offset == 0 {
			s.lr = hlr
			start.Offset, start.Line = hend, 2
			s.pos = start
		} else if start.Offset < hend {
			return nil, fmt.Errorf("stream: open file source %s: position offset %d is inside the header", opts.Path, start.Offset)
		}
	} else {
		s.dec = NewJSONDecoder(opts.Decode)
	}

	if s.lr == nil {
		if start.Offset > 0 {
			if err := s.skipTo(r, start.Offset); err != nil {
				return nil, err
			}
		}
		s.lr = newLineReader(r, start.Offset)
	}
	if opts.Follow {
		f := s.files[0]
		s.stat = func() (int64, error) {
			fi, err := f.Stat()
			if err != nil {
				return 0, err
			}
			return fi.Size(), nil
		}
	}
	s.free <- new(Batch)
	s.free <- new(Batch)
	ok = true
	go s.run()
	return s, nil
}

func formatFromExt(path string) string {
	p := strings.ToLower(path)
	p = strings.TrimSuffix(p, ".gz")
	switch filepath.Ext(p) {
	case ".jsonl", ".ndjson", ".json":
		return "jsonl"
	case ".csv":
		return "csv"
	case ".tsv", ".tab":
		return "tsv"
	}
	return ""
}

// open opens the file once more and returns a reader of its decompressed
// bytes from the start, and whether it is gzip.
func (s *FileSource) open() (io.Reader, bool, error) {
	f, err := os.Open(s.opts.Path)
	if err != nil {
		return nil, false, fmt.Errorf("stream: open file source: %w", err)
	}
	s.files = append(s.files, f)
	var magic [2]byte
	n, _ := f.ReadAt(magic[:], 0)
	if n == 2 && magic[0] == 0x1f && magic[1] == 0x8b {
		zr, err := gzip.NewReader(bufio.NewReaderSize(f, 64<<10))
		if err != nil {
			return nil, false, fmt.Errorf("stream: open file source %s: gzip: %w", s.opts.Path, err)
		}
		return zr, true, nil
	}
	return f, false, nil
}

// skipTo moves r to offset, which must be the start of a line: the byte
// before it must be '\n'. A plain file seeks; a gzip stream reads and
// discards.
func (s *FileSource) skipTo(r io.Reader, offset int64) error {
	bad := func(why string) error {
		return fmt.Errorf("stream: open file source %s: resume at offset %d: %s", s.opts.Path, offset, why)
	}
	if f, ok := r.(*os.File); ok {
		if _, err := f.Seek(offset-1, io.SeekStart); err != nil {
			return bad(err.Error())
		}
	} else if n, err := io.CopyN(io.Discard, r, offset-1); err != nil {
		if errors.Is(err, io.EOF) {
			return bad(fmt.Sprintf("beyond the end of the data (%d bytes)", n))
		}
		return bad(err.Error())
	}
	var c [1]byte
	if _, err := io.ReadFull(r, c[:]); err != nil {
		if errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) {
			return bad("beyond the end of the data")
		}
		return bad(err.Error())
	}
	if c[0] != '\n' {
		return bad("not the start of a line (the file changed?)")
	}
	return nil
}

// run is the reader goroutine: it fills free batches and hands them out.
func (s *FileSource) run() {
	defer close(s.done)
	for {
		var b *Batch
		select {
		case b = <-s.free:
		case <-s.stop:
			return
		}
		err := s.fill(b)
		if errors.Is(err, errStopped) {
			return
		}
		select {
		case s.out <- fileResult{b, err}:
		case <-s.stop:
			return
		}
		if err != nil {
			return
		}
	}
}

var errStopped = errors.New("stream: source closed")

// fill reads records into b until it holds BatchSize records, the data ends,
// or (follow mode) nothing new arrives for a while. It returns io.EOF only if
// b covers no line at all.
func (s *FileSource) fill(b *Batch) error {
	b.Reset()
	b.Pos = s.pos
	covered := false
	var idle time.Duration
	for b.Len()+b.Rejected < s.opts.BatchSize {
		line, off, st, err := s.lr.next(s.opts.Follow)
		if err != nil {
			return fmt.Errorf("stream: read %s at offset %d: %w", s.opts.Path, s.pos.Offset, err)
		}
		switch st {
		case lineEOF:
			if covered {
				return nil
			}
			return io.EOF
		case lineWait:
			if covered {
				return nil
			}
			if size, err := s.stat(); err == nil && size < s.pos.Offset {
				return fmt.Errorf("stream: follow %s: file shrank to %d bytes, below offset %d (truncated or replaced)", s.opts.Path, size, s.pos.Offset)
			}
			if idle >= idleEmit {
				return nil // an empty batch, so the caller can flush on time
			}
			d := min(s.opts.PollInterval, idleEmit)
			t := time.NewTimer(d)
			select {
			case <-t.C:
			case <-s.stop:
				t.Stop()
				return errStopped
			}
			idle += d
			continue
		}
		lineNo := s.pos.Line
		s.pos.Offset = s.lr.base + int64(s.lr.start)
		s.pos.Line++
		covered = true
		if st == lineTooLong {
			de := &DecodeError{Where: whereLine(lineNo), Reason: fmt.Sprintf("line longer than %d bytes", MaxLineLen)}
			if err := s.reject(b, line, off, lineNo, de); err != nil {
				return err
			}
			b.Pos = s.pos
			continue
		}
		line = bytes.TrimSuffix(line, []byte("\r"))
		if lineNo == 1 {
			line = bytes.TrimPrefix(line, []byte("\xef\xbb\xbf")) // a UTF-8 byte order mark
		}
		if len(bytes.TrimSpace(line)) == 0 {
			b.Pos = s.pos
			continue
		}
		n := b.Len()
		if err := s.dec.Decode(line, b); err != nil {
			var de *DecodeError
			if !errors.As(err, &de) {
				de = &DecodeError{Reason: err.Error()}
			}
			de.Where = whereLine(lineNo)
			if err := s.reject(b, line, off, lineNo, de); err != nil {
				return err
			}
		} else if b.Len() > n {
			ev := &b.Events[b.Len()-1]
			ev.Partition, ev.Offset = 0, off
		}
		b.Pos = s.pos
	}
	return nil
}

func (s *FileSource) reject(b *Batch, line []byte, off, lineNo int64, de *DecodeError) error {
	b.Rejected++
	if s.opts.Rejects == nil {
		return nil
	}
	if err := s.opts.Rejects.Reject(Rejected{Raw: line, Err: de, Offset: off, Line: lineNo}); err != nil {
		return fmt.Errorf("stream: set aside %s %s: %w", s.opts.Path, de.Where, err)
	}
	return nil
}

// Next returns the next batch. The batch returned by the previous call goes
// back to the reader goroutine and must no longer be used.
func (s *FileSource) Next(ctx context.Context) (*Batch, error) {
	if s.err != nil {
		return nil, s.err
	}
	if s.held != nil {
		s.free <- s.held
		s.held = nil
	}
	select {
	case r := <-s.out:
		if r.err != nil {
			s.err = r.err
			return nil, r.err
		}
		s.held = r.b
		return r.b, nil
	case <-s.done:
		s.err = errStopped
		return nil, s.err
	case <-ctx.Done():
		return nil, ctx.Err()
	}
}

// Commit records p; a file needs no acknowledgement, so Commit only checks
// that p is a position of this source.
func (s *FileSource) Commit(_ context.Context, p Position) error {
	if p.Source != "file" || filepath.Clean(p.Path) != filepath.Clean(s.opts.Path) {
		return fmt.Errorf("stream: commit to file source %s: foreign position %s", s.opts.Path, p)
	}
	s.commit = p.Clone()
	return nil
}

// Close stops the reader goroutine, waits for it and closes the file. It is
// safe to call more than once.
func (s *FileSource) Close() error {
	var err error
	s.once.Do(func() {
		close(s.stop)
		<-s.done
		for _, f := range s.files {
			err = errors.Join(err, f.Close())
		}
	})
	return err
}

// lineReader splits a byte stream into lines without copying them, in a
// buffer that grows up to MaxLineLen.
type lineReader struct {
	r          io.Reader
	buf        []byte
	base       int64 // stream offset of buf[0]
	start, end int   // unread bytes are buf[start:end]
	scanned    int   // buf[start:scanned] holds no '\n'
	eof        bool  // r returned io.EOF on the last read
	long       bool  // skipping the rest of an over-long line
	longOff    int64
	longRaw    []byte
}

type lineStatus uint8

const (
	lineOK      lineStatus = iota
	lineTooLong            // line is the first maxRejectRaw bytes of an over-long line
	lineWait               // follow mode: no complete line yet
	lineEOF                // no more data
)

func newLineReader(r io.Reader, base int64) *lineReader {
	return &lineReader{r: r, buf: make([]byte, 64<<10), base: base}
}

// next returns the next line without its '\n' (valid until the next call)
// and the stream offset where it starts. With follow false, a last line
// without '\n' is returned at the end of the data.
func (lr *lineReader) next(follow bool) ([]byte, int64, lineStatus, error) {
	for {
		if j := bytes.IndexByte(lr.buf[lr.scanned:lr.end], '\n'); j >= 0 {
			nl := lr.scanned + j
			line := lr.buf[lr.start:nl]
			off := lr.base + int64(lr.start)
			lr.start = nl + 1
			lr.scanned = lr.start
			if lr.long {
				lr.long = false
				return lr.longRaw, lr.longOff, lineTooLong, nil
			}
			if len(line) > MaxLineLen {
				return line[:maxRejectRaw], off, lineTooLong, nil
			}
			return line, off, lineOK, nil
		}
		lr.scanned = lr.end
		if lr.long {
			// Drop what has been read of the over-long line.
			lr.start = lr.end
			lr.scanned = lr.end
		} else if lr.end-lr.start > MaxLineLen {
			lr.long = true
			lr.longOff = lr.base + int64(lr.start)
			lr.longRaw = append(lr.longRaw[:0], lr.buf[lr.start:lr.start+maxRejectRaw]...)
			lr.start = lr.end
			lr.scanned = lr.end
		}
		if lr.eof && !follow {
			if lr.long {
				lr.long = false
				return lr.longRaw, lr.longOff, lineTooLong, nil
			}
			if lr.start < lr.end {
				line := lr.buf[lr.start:lr.end]
				off := lr.base + int64(lr.start)
				lr.start = lr.end
				lr.scanned = lr.end
				return line, off, lineOK, nil
			}
			return nil, 0, lineEOF, nil
		}
		// Make room: move the unread bytes to the front, or grow.
		if lr.start > 0 && (lr.end == len(lr.buf) || lr.start == lr.end) {
			n := copy(lr.buf, lr.buf[lr.start:lr.end])
			lr.base += int64(lr.start)
			lr.scanned -= lr.start
			lr.start, lr.end = 0, n
		}
		if lr.end == len(lr.buf) {
			nb := make([]byte, min(2*len(lr.buf), MaxLineLen+1+64<<10))
			copy(nb, lr.buf[:lr.end])
			lr.buf = nb
		}
		n, err := lr.r.Read(lr.buf[lr.end:])
		lr.end += n
		if err != nil {
			if !errors.Is(err, io.EOF) {
				return nil, 0, lineEOF, err
			}
			lr.eof = true
			if n == 0 && follow {
				return nil, 0, lineWait, nil
			}
		} else {
			lr.eof = false
		}
	}
}
