package checkpoint

import (
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"

	"go.uber.org/zap"

	"freshet.dev/freshet/online"
)

// RecoverInfo says what Recover read and what it dropped or set aside.
type RecoverInfo struct {
	// Reapply is how many events the process before this one had applied
	// beyond the recovered cut (from its last Mark): the events a restart
	// applies again. Zero after a clean stop; a lower bound (by at most the
	// batch in hand) after a process crash, and unknown (zero) after a
	// machine crash, which loses the unsynced mark.
	Reapply uint64

	// Snapshot is the file name of the snapshot loaded ("" when recovery
	// started from an empty model and log-1).
	Snapshot string
	// SnapshotRows is the number of rows it held.
	SnapshotRows int
	// Logs are the log file names replayed, in order.
	Logs []string
	// Records is the number of log records replayed; LogRows the rows in them.
	Records int
	LogRows int
	// TornBytes is the size of the torn tail dropped from the newest log (0
	// when the log ended cleanly); TornFile names that log and TornOffset is
	// where the dropped bytes began (the file is now cut there).
	TornBytes  int64
	TornFile   string
	TornOffset int64
	// SetAside lists the snapshots, newest first, that failed their checksums
	// and were renamed to *.bad; Recover fell back past each of them.
	SetAside []SetAside
}

// SetAside is a snapshot that recovery could not use.
type SetAside struct {
	File string // the original file name; it is now File with a .bad suffix
	Err  error  // what was wrong (a *CorruptError)
}

// recovery holds the buffers of one Recover run.
type recovery struct {
	s     *Store
	apply func(*online.RowRecord) error
	dec   rowDecoder
	rank  int
	buf   []byte
	meta  []byte // meta JSON of the newest frame read
}

func (r *recovery) setRank(k int) {
	r.rank = k
	r.dec.setRank(k)
}

// payload returns a reused buffer of n bytes.
func (r *recovery) payload(n int) []byte {
	if cap(r.buf) < n {
		r.buf = make([]byte, n)
	}
	return r.buf[:n]
}

func (r *recovery) applyRows(name string, base int64, p []byte, count int) (int, error) {
	return r.applyRowsWith(r.apply, name, base, p, count)
}

// applyRowsWith decodes count rows from p (found at offset base of file
// name), calling fn for each when fn is not nil. The payload must hold
// exactly count rows.
func (r *recovery) applyRowsWith(fn func(*online.RowRecord) error, name string, base int64, p []byte, count int) (int, error) {
	rest := p
	for i := 0; i < count; i++ {
		at := base + int64(len(p)-len(rest))
		next, why := r.dec.decode(rest)
		if why != "" {
			return i, &CorruptError{File: name, Offset: at, Reason: why}
		}
		rest = next
		if fn != nil {
			if err := fn(&r.dec.rec); err != nil {
				return i, fmt.Errorf("checkpoint: apply %s row %d from %s offset %d: %w", r.dec.rec.Side, r.dec.rec.Row, name, at, err)
			}
		}
	}
	if len(rest) != 0 {
		return count, &CorruptError{File: name, Offset: base + int64(len(p)-len(rest)),
			Reason: fmt.Sprintf("%d bytes after the %d rows the frame counts", len(rest), count)}
	}
	return count, nil
}

// Recover loads the newest snapshot that passes its checksums and replays the
// logs that follow it, calling apply for each row: the snapshot's rows first,
// then every log record's rows in the order they were appended (Deleted
// records too; a later record for a row overwrites an earlier one). The
// record passed to apply and its ID and Vec are valid only during the call:
// apply must copy what it keeps.
//
// It returns the meta of the newest cut (the last log record's, or the
// snapshot's when no record follows it), or nil when the directory holds no
// state: a new model. A torn last record of the newest log is dropped, the log
// is cut back to the last good record so that Appends continue cleanly, and
// info reports it. A snapshot that fails its checksums is renamed *.bad and
// recovery falls back to the previous one (kept when Keep > 1), or to log-1
// if it is still there. Damage anywhere else is a *CorruptError naming the
// file and offset.
//
// Recover runs once per Store, before any Append or BeginSnapshot. When it
// returns an error, rows may already have been applied: discard them.
func (s *Store) Recover(apply func(rec *online.RowRecord) error) (meta *online.Meta, info RecoverInfo, err error) {
	if s.closed {
		return nil, info, ErrClosed
	}
	if !s.needRecover && (s.gen != 0 || s.recovered) {
		return nil, info, errors.New("checkpoint: Recover already ran on this store")
	}
	if apply == nil {
		return nil, info, errors.New("checkpoint: recover: apply is nil")
	}
	l, err := s.list()
	if err != nil {
		return nil, info, err
	}
	if len(l.snaps) == 0 && len(l.logs) == 0 {
		s.needRecover, s.recovered = false, true
		if m, ok := s.readMark(); ok {
			info.Reapply = m // events applied before any cut was durable
		}
		return nil, info, nil
	}
	r := &recovery{s: s, apply: apply}
	var maxLog uint64
	if len(l.logs) > 0 {
		maxLog = l.logs[len(l.logs)-1]
	}

	// Choose the base: the newest snapshot that verifies, else the empty model.
	var base uint64
	for i := len(l.snaps) - 1; i >= 0; i-- {
		g := l.snaps[i]
		if why := covered(l.logs, g, maxLog); why != "" {
			return nil, info, &CorruptError{File: snapName(g), Reason: why}
		}
		_, err := r.readSnapshot(g, false)
		if err == nil {
			base = g
			break
		}
		if !errors.Is(err, ErrCorrupt) {
			return nil, info, err
		}
		r.setRank(0)
		name := snapName(g)
		s.log.Warn("snapshot failed its checksums; set aside", zap.String("file", name), zap.Error(err))
		if rerr := os.Rename(filepath.Join(s.dir, name), filepath.Join(s.dir, name+".bad")); rerr != nil {
			return nil, info, errors.Join(err, fmt.Errorf("checkpoint: set aside %s: %w", name, rerr))
		}
		info.SetAside = append(info.SetAside, SetAside{File: name, Err: err})
	}
	first := base
	if base == 0 {
		first = 1
		if len(l.logs) == 0 || l.logs[0] != 1 {
			why := "no usable snapshot"
			if len(l.logs) > 0 {
				why += fmt.Sprintf(" and the logs start at %s, not log-1", logName(l.logs[0]))
			}
			return nil, info, fmt.Errorf("checkpoint: recover %s: %s", s.dir, why)
		}
		if why := covered(l.logs, 1, maxLog); why != "" {
			return nil, info, fmt.Errorf("checkpoint: recover %s: %s", s.dir, why)
		}
	}

	// Replay.
	if base != 0 {
		info.Snapshot = snapName(base)
		n, err := r.readSnapshot(base, true)
		info.SnapshotRows = n
		if err != nil {
			return nil, info, err
		}
	}
	var last logScan
	for g := first; g <= maxLog; g++ {
		sc, err := r.readLog(g, g == maxLog)
		info.Logs = append(info.Logs, logName(g))
		info.Records += sc.records
		info.LogRows += sc.rows
		if err != nil {
			return nil, info, err
		}
		last = sc
	}
	if last.torn > 0 {
		info.TornBytes, info.TornFile, info.TornOffset = last.torn, logName(maxLog), last.goodEnd
		s.log.Warn("dropped torn last log record", zap.String("file", info.TornFile),
			zap.Int64("offset", info.TornOffset), zap.Int64("bytes", info.TornBytes))
	}

	if base != 0 || info.Records > 0 {
		meta = new(online.Meta)
		if err := json.Unmarshal(r.meta, meta); err != nil {
			return nil, info, fmt.Errorf("checkpoint: recover: decode meta of the newest cut: %w", err)
		}
		if meta.Format != online.MetaFormat {
			return nil, info, fmt.Errorf("checkpoint: recover: meta format %d, this build reads %d", meta.Format, online.MetaFormat)
		}
		if meta.Rank != r.rank {
			return nil, info, fmt.Errorf("checkpoint: recover: meta rank %d differs from the rows' rank %d", meta.Rank, r.rank)
		}
	}
	if err := s.resumeLog(maxLog, last, r.rank); err != nil {
		return nil, info, err
	}
	if m, ok := s.readMark(); ok && meta != nil && m > meta.Counts.Applied {
		info.Reapply = m - meta.Counts.Applied
	}
	s.needRecover, s.recovered = false, true
	return meta, info, nil
}

// covered reports why logs (ascending) do not hold every generation from
// first to last, or "" when they do.
func covered(logs []uint64, first, last uint64) string {
	if last < first {
		return fmt.Sprintf("%s is missing", logName(first))
	}
	want := first
	for _, g := range logs {
		if g < first {
			continue
		}
		if g != want {
			return fmt.Sprintf("%s is missing", logName(want))
		}
		want++
	}
	return ""
}

// resumeLog opens the newest log for appending after its last good record,
// cutting off a torn tail first.
func (s *Store) resumeLog(gen uint64, sc logScan, rank int) error {
	name := logName(gen)
	path := filepath.Join(s.dir, name)
	if sc.goodEnd == 0 && rank == 0 {
		// Only log-1 of a model that never recorded anything, its header torn.
		if err := os.Remove(path); err != nil {
			return fmt.Errorf("checkpoint: remove torn %s: %w", name, err)
		}
		return s.syncDir()
	}
	f, err := os.OpenFile(path, os.O_RDWR, 0)
	if err != nil {
		return fmt.Errorf("checkpoint: open %s: %w", name, err)
	}
	end := sc.goodEnd
	if sc.torn > 0 || end == 0 {
		err := f.Truncate(end)
		if err == nil && end == 0 {
			_, err = f.WriteAt(putFileHeader(nil, fileHeader{magic: logMagic, rank: rank, gen: gen}), 0)
			end = fileHeaderSize
		}
		if err == nil {
			err = f.Sync()
		}
		if err != nil {
			f.Close()
			return fmt.Errorf("checkpoint: cut torn tail of %s: %w", name, err)
		}
	}
	s.logF, s.logName, s.logEnd = f, name, end
	s.logSize.Store(s.logEnd)
	s.gen, s.rank = gen, rank
	return nil
}
