// Package checkpoint keeps freshet's durable local state: full snapshots of
// the factor tables plus an incremental log of the rows changed since, in one
// data directory. Store implements online.Checkpointer and recovers the newest
// exact state after a crash.
//
// # Files
//
// The directory holds:
//
//	LOCK              exclusive flock(2) of the owning process, with its PID
//	log-<gen>.bin     incremental log of generation gen
//	snap-<gen>.bin    complete snapshot of generation gen
//	snap-<gen>.tmp    a snapshot being written (removed by Open)
//	snap-<gen>.bad    a snapshot that failed its checksums, set aside by Recover
//
// A generation starts at each BeginSnapshot, which opens log-<gen+1> and
// starts snap-<gen+1>.tmp. Generation numbers go up by one, so logs are
// contiguous. The very first Append in an empty directory opens log-1.
//
// State at the end of the newest log = snapshot g (if any) + every log with a
// number ≥ g, in order; with no snapshot, every log from log-1. Later row
// records overwrite earlier ones, which is what makes the "fuzzy" snapshot
// exact: each row in snap-g was copied at some batch boundary after the
// BeginSnapshot that opened log-g, and every change after that copy is in
// log-g or later.
//
// # Crash safety
//
// Append writes one framed, CRC-32C checksummed record and fsyncs the log
// before it returns. A crash can therefore tear only the last record of the
// newest log, which Recover drops (truncating the file to the last good
// record). Any other damage in a log is an error: a record in the middle
// cannot be skipped without losing an acknowledged cut.
//
// A snapshot is written to snap-<gen>.tmp, fsynced, renamed to .bin and the
// directory fsynced; a crash at any point leaves either no .bin (the previous
// snapshot and its logs, which are not deleted until after the rename, still
// recover) or a complete one. A snapshot that fails its checksums is set aside
// and Recover falls back to the previous snapshot when one is kept (Keep > 1),
// or to log-1 when no log has been pruned yet.
//
// # Locking
//
// Open takes flock(LOCK_EX|LOCK_NB) on Dir/LOCK. flock locks belong to the
// open file description, so a second Open of the same directory fails even
// inside the same process, and the lock is released when the Store is closed
// or the process dies (no stale lock after a crash). flock is advisory and is
// not reliable on network file systems: keep the directory on a local disk.
//
// # Cost
//
// Encoding reuses the Store's buffers: WriteRows and Append allocate only when
// a buffer must grow. Snapshot rows are collected in 1 MiB checksummed blocks,
// which pass through a 256 KiB bufio.Writer without being copied again (small
// frames are buffered). A whole Append is one record held in memory before it is
// written, so that it stays atomic.
package checkpoint

import (
	"bufio"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync/atomic"

	"go.uber.org/zap"

	"freshet.dev/freshet/online"
)

// Errors returned by a Store.
var (
	// ErrLocked is matched by the error Open returns when another Store (in
	// this process or another) holds the directory.
	ErrLocked = errors.New("checkpoint: directory locked")
	// ErrCorrupt is matched by every *CorruptError.
	ErrCorrupt = errors.New("checkpoint: corrupt file")
	// ErrClosed is returned by every method after Close.
	ErrClosed = errors.New("checkpoint: store closed")
	// ErrNotRecovered is returned by Append and BeginSnapshot on a directory
	// that holds state when Recover has not been called.
	ErrNotRecovered = errors.New("checkpoint: Recover must run before writing to a directory that holds state")
	// ErrNoSnapshot is returned by WriteRows and Commit without a BeginSnapshot.
	ErrNoSnapshot = errors.New("checkpoint: no snapshot in progress")
)

// CorruptError reports damage found in a checkpoint file.
type CorruptError struct {
	// File is the file name within the directory.
	File string
	// Offset is the byte offset of the damaged frame or field.
	Offset int64
	// Reason says what is wrong, in lower case.
	Reason string
}

func (e *CorruptError) Error() string {
	return fmt.Sprintf("checkpoint: %s offset %d: %s", e.File, e.Offset, e.Reason)
}

// Is makes errors.Is(err, ErrCorrupt) true for every CorruptError.
func (e *CorruptError) Is(target error) bool { return target == ErrCorrupt }

// DefaultKeep is the number of complete snapshots kept when Options.Keep is 0.
const DefaultKeep = 1

const (
	snapBlockSize  = 1 << 20
	snapBufferSize = 256 << 10
	readBufferSize = 1 << 20
	lockName       = "LOCK"
)

// Options configure a Store.
type Options struct {
	// Dir is the data directory. It is created (mode 0o750) if missing.
	Dir string
	// Keep is the number of complete snapshots kept after a Commit, not
	// counting one being written. If zero, DefaultKeep is used. Logs are kept
	// from the oldest kept snapshot on, so every kept snapshot can recover.
	Keep int
	// Logger receives a few lines per snapshot and recovery. If nil, nothing
	// is logged.
	Logger *zap.Logger
}

// Store is a checkpoint directory opened for writing. It implements
// online.Checkpointer. Its methods are meant for one goroutine (the trainer's
// writer) and are not safe for concurrent use.
type Store struct {
	dir  string
	keep int
	log  *zap.Logger
	lock *os.File

	closed bool
	// needRecover is set by Open when the directory holds snapshots or logs,
	// and cleared by Recover.
	needRecover bool
	recovered   bool
	// broken is a sticky error: a failed write whose effect on the files could
	// not be undone.
	broken error

	// gen is the current generation (0: nothing written yet).
	gen uint64
	// rank is the rank of the current log (0: not known yet).
	rank int

	logF    *os.File
	logName string
	logEnd  int64
	// logSize mirrors logEnd for LogBytes, which other goroutines call.
	logSize atomic.Int64
	// markF is the MARK file, opened by the first Mark.
	markF   atomic.Pointer[os.File]
	lastSeq uint64 // meta.Seq of the last Append
	rec     []byte // reused record buffer
	block   []byte // reused snapshot block buffer

	snap *snapWriter
}

var _ online.Checkpointer = (*Store)(nil)

// LogBytes returns the size of the current log file: the bytes a recovery
// replays on top of the newest snapshot. Safe for concurrent use; the trainer
// uses it to start a snapshot early when the log grows large.
func (s *Store) LogBytes() int64 { return s.logSize.Load() }

// Open opens (creating if needed) the checkpoint directory o.Dir and takes an
// exclusive lock on it. It removes stray *.tmp files left by a crash. A Store
// on a directory that already holds state must run Recover before writing.
func Open(o Options) (*Store, error) {
	if o.Dir == "" {
		return nil, errors.New("checkpoint: option Dir is empty")
	}
	if o.Keep < 0 {
		return nil, fmt.Errorf("checkpoint: option Keep must be ≥ 0, got %d", o.Keep)
	}
	s := &Store{dir: o.Dir, keep: o.Keep, log: o.Logger}
	if s.keep == 0 {
		s.keep = DefaultKeep
	}
	if s.log == nil {
		s.log = zap.NewNop()
	}
	if err := os.MkdirAll(o.Dir, 0o750); err != nil {
		return nil, fmt.Errorf("checkpoint: create directory: %w", err)
	}
	lock, err := lockDir(o.Dir)
	if err != nil {
		return nil, err
	}
	s.lock = lock
	l, err := s.list()
	if err != nil {
		return nil, errors.Join(err, s.unlock())
	}
	for _, name := range l.tmp {
		if err := os.Remove(filepath.Join(s.dir, name)); err != nil && !errors.Is(err, os.ErrNotExist) {
			return nil, errors.Join(fmt.Errorf("checkpoint: remove stray %s: %w", name, err), s.unlock())
		}
		s.log.Info("removed unfinished snapshot", zap.String("file", name))
	}
	s.needRecover = len(l.snaps) > 0 || len(l.logs) > 0
	return s, nil
}

// Close closes the open files and releases the directory lock. A snapshot in
// progress is abandoned (its .tmp file is removed). Close is safe to call more
// than once.
func (s *Store) Close() error {
	if s.closed {
		return nil
	}
	s.closed = true
	var errs []error
	if s.snap != nil {
		errs = append(errs, s.abandonSnapshot())
	}
	if s.logF != nil {
		errs = append(errs, s.logF.Close())
		s.logF = nil
	}
	errs = append(errs, s.closeMark(), s.unlock())
	return errors.Join(errs...)
}

func (s *Store) unlock() error {
	if s.lock == nil {
		return nil
	}
	err := s.lock.Close() // closing the descriptor drops the flock
	s.lock = nil
	if err != nil {
		return fmt.Errorf("checkpoint: release lock: %w", err)
	}
	return nil
}

// usable returns the error that stops any write, or nil.
func (s *Store) usable() error {
	switch {
	case s.closed:
		return ErrClosed
	case s.broken != nil:
		return s.broken
	case s.needRecover:
		return ErrNotRecovered
	}
	return nil
}

// listing is the directory's checkpoint files, by kind, generations ascending.
type listing struct {
	snaps []uint64
	logs  []uint64
	tmp   []string
}

func (s *Store) list() (listing, error) {
	var l listing
	ents, err := os.ReadDir(s.dir)
	if err != nil {
		return l, fmt.Errorf("checkpoint: list directory: %w", err)
	}
	for _, e := range ents {
		name := e.Name()
		if strings.HasSuffix(name, ".tmp") {
			l.tmp = append(l.tmp, name)
			continue
		}
		if g, ok := parseName(name, "snap-"); ok {
			l.snaps = append(l.snaps, g)
		} else if g, ok := parseName(name, "log-"); ok {
			l.logs = append(l.logs, g)
		}
	}
	slices.Sort(l.snaps)
	slices.Sort(l.logs)
	return l, nil
}

func snapName(gen uint64) string { return fmt.Sprintf("snap-%010d.bin", gen) }
func logName(gen uint64) string  { return fmt.Sprintf("log-%010d.bin", gen) }

// parseName returns the generation of a "<prefix><digits>.bin" file name.
func parseName(name, prefix string) (uint64, bool) {
	rest, ok := strings.CutPrefix(name, prefix)
	if !ok {
		return 0, false
	}
	digits, ok := strings.CutSuffix(rest, ".bin")
	if !ok || digits == "" {
		return 0, false
	}
	g, err := strconv.ParseUint(digits, 10, 64)
	if err != nil || g == 0 {
		return 0, false
	}
	return g, true
}

// syncDir fsyncs the directory so that creates, renames and removes in it
// are durable.
func (s *Store) syncDir() error {
	d, err := os.Open(s.dir)
	if err != nil {
		return fmt.Errorf("checkpoint: sync directory: %w", err)
	}
	err = d.Sync()
	if cerr := d.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		return fmt.Errorf("checkpoint: sync directory: %w", err)
	}
	return nil
}

// createFile creates name exclusively, writes header, fsyncs it and the
// directory, and returns the file positioned after the header.
func (s *Store) createFile(name string, h fileHeader) (*os.File, error) {
	path := filepath.Join(s.dir, name)
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE|os.O_EXCL, 0o640)
	if err != nil {
		return nil, fmt.Errorf("checkpoint: create %s: %w", name, err)
	}
	fail := func(err error) (*os.File, error) {
		f.Close()
		os.Remove(path)
		return nil, fmt.Errorf("checkpoint: create %s: %w", name, err)
	}
	if _, err := f.Write(putFileHeader(nil, h)); err != nil {
		return fail(err)
	}
	if err := f.Sync(); err != nil {
		return fail(err)
	}
	if err := s.syncDir(); err != nil {
		return fail(err)
	}
	return f, nil
}

// newReader wraps f in a large read buffer.
func newReader(f *os.File) *bufio.Reader { return bufio.NewReaderSize(f, readBufferSize) }
