package checkpoint

import (
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"

	"go.uber.org/zap"

	"freshet.dev/freshet/online"
)

// Append writes rows (the rows changed since the previous Append, Deleted
// records included; nil or empty is allowed) and meta as one log record, and
// returns once the record is durable (fsync). rows.Rank, meta.Rank and every
// vector length must agree with the log's rank. On a write error the log is
// cut back to the previous record; if that fails too the Store refuses
// further writes.
func (s *Store) Append(rows *online.RowSet, meta *online.Meta) error {
	if err := s.usable(); err != nil {
		return err
	}
	if meta == nil {
		return errors.New("checkpoint: append: meta is nil")
	}
	k := meta.Rank
	if k <= 0 || k > maxRank {
		return fmt.Errorf("checkpoint: append: meta rank %d out of range [1, %d]", k, maxRank)
	}
	if s.rank != 0 && k != s.rank {
		return fmt.Errorf("checkpoint: append: meta rank %d differs from the log's rank %d", k, s.rank)
	}
	var recs []online.RowRecord
	if rows != nil && rows.Len() > 0 {
		if rows.Rank != k {
			return fmt.Errorf("checkpoint: append: row set rank %d differs from meta rank %d", rows.Rank, k)
		}
		recs = rows.Recs
	}
	mj, err := json.Marshal(meta)
	if err != nil {
		return fmt.Errorf("checkpoint: append: encode meta: %w", err)
	}

	buf := grow(s.rec[:0], frameHeadSize+8)
	binary.LittleEndian.PutUint32(buf[frameHeadSize:], uint32(len(recs)))
	binary.LittleEndian.PutUint32(buf[frameHeadSize+4:], uint32(len(mj)))
	buf = append(buf, mj...)
	for i := range recs {
		rec := &recs[i]
		if why := checkRow(rec, k); why != "" {
			s.rec = buf
			return fmt.Errorf("checkpoint: append: record %d (%s row %d): %s", i, rec.Side, rec.Row, why)
		}
		buf = appendRow(buf, rec)
	}
	s.rec = buf
	payload := buf[frameHeadSize:]
	if len(payload) > math.MaxUint32 {
		return fmt.Errorf("checkpoint: append: record of %d bytes exceeds the 4 GiB record limit", len(payload))
	}
	putFrameHead(buf, tagRecord, payload)

	if s.logF == nil {
		if err := s.startLog(s.gen+1, k); err != nil {
			return err
		}
	}
	if _, err := s.logF.WriteAt(buf, s.logEnd); err != nil {
		return s.undoAppend(fmt.Errorf("checkpoint: append to %s: %w", s.logName, err))
	}
	if err := s.logF.Sync(); err != nil {
		return s.undoAppend(fmt.Errorf("checkpoint: sync %s: %w", s.logName, err))
	}
	s.logEnd += int64(len(buf))
	s.logSize.Store(s.logEnd)
	s.lastSeq = meta.Seq
	if s.snap != nil {
		s.snap.appended = true
	}
	return nil
}

// undoAppend cuts the log back to its last good record after a failed write.
func (s *Store) undoAppend(cause error) error {
	if err := s.logF.Truncate(s.logEnd); err != nil {
		s.broken = errors.Join(cause, fmt.Errorf("checkpoint: cut %s back to offset %d: %w (store unusable)", s.logName, s.logEnd, err))
		return s.broken
	}
	return cause
}

// startLog creates log-<gen> and makes it the log Appends go to.
func (s *Store) startLog(gen uint64, rank int) error {
	name := logName(gen)
	f, err := s.createFile(name, fileHeader{magic: logMagic, rank: rank, gen: gen})
	if err != nil {
		return err
	}
	if s.logF != nil {
		if err := s.logF.Close(); err != nil {
			s.log.Warn("close log", zap.String("file", s.logName), zap.Error(err))
		}
	}
	s.logF, s.logName, s.logEnd = f, name, fileHeaderSize
	s.logSize.Store(s.logEnd)
	s.gen, s.rank = gen, rank
	return nil
}

// logScan is what reading one log found.
type logScan struct {
	records int
	rows    int
	// goodEnd is the offset after the last good record (0: the header itself
	// is torn).
	goodEnd int64
	// torn is the number of bytes after goodEnd that were dropped.
	torn int64
}

// readLog reads log-<gen>, calling apply for every row of every good record,
// and keeps the newest meta JSON in r.meta. When last is true (the newest log)
// a torn final record (or header) is tolerated and reported; any other damage
// is a *CorruptError. rank 0 means "take the header's rank".
func (r *recovery) readLog(gen uint64, last bool) (logScan, error) {
	var sc logScan
	name := logName(gen)
	f, err := os.Open(filepath.Join(r.s.dir, name))
	if err != nil {
		return sc, fmt.Errorf("checkpoint: open %s: %w", name, err)
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return sc, fmt.Errorf("checkpoint: stat %s: %w", name, err)
	}
	size := st.Size()
	corrupt := func(off int64, format string, args ...any) error {
		return &CorruptError{File: name, Offset: off, Reason: fmt.Sprintf(format, args...)}
	}
	tornAt := func(off int64) (logScan, error) {
		sc.goodEnd, sc.torn = off, size-off
		return sc, nil
	}
	if size < fileHeaderSize {
		if last {
			return tornAt(0)
		}
		return sc, corrupt(0, "file is %d bytes, shorter than its %d-byte header", size, fileHeaderSize)
	}
	br := newReader(f)
	var hb [fileHeaderSize]byte
	if _, err := io.ReadFull(br, hb[:]); err != nil {
		return sc, fmt.Errorf("checkpoint: read %s: %w", name, err)
	}
	h, why := parseFileHeader(hb[:], logMagic)
	if why != "" {
		return sc, corrupt(0, "%s", why)
	}
	if h.gen != gen {
		return sc, corrupt(16, "header says generation %d, file name says %d", h.gen, gen)
	}
	if r.rank == 0 {
		r.setRank(h.rank)
	} else if h.rank != r.rank {
		return sc, corrupt(12, "rank %d differs from rank %d of the state before it", h.rank, r.rank)
	}

	off := int64(fileHeaderSize)
	var fh [frameHeadSize]byte
	for off < size {
		if size-off < frameHeadSize {
			if last {
				return tornAt(off)
			}
			return sc, corrupt(off, "record header cut short (%d bytes before end of file)", size-off)
		}
		if _, err := io.ReadFull(br, fh[:]); err != nil {
			return sc, fmt.Errorf("checkpoint: read %s: %w", name, err)
		}
		head, ok := parseFrameHead(fh[:])
		if !ok {
			if last && zeroFrom(f, off, size) {
				return tornAt(off)
			}
			return sc, corrupt(off, "record header checksum mismatch")
		}
		if head.tag != tagRecord {
			return sc, corrupt(off, "frame tag %#x is not a log record", head.tag)
		}
		end := off + frameHeadSize + head.length
		if end > size {
			if last {
				return tornAt(off)
			}
			return sc, corrupt(off, "record of %d bytes runs past end of file", head.length)
		}
		p := r.payload(int(head.length))
		if _, err := io.ReadFull(br, p); err != nil {
			return sc, fmt.Errorf("checkpoint: read %s: %w", name, err)
		}
		if checksum(p) != head.crc {
			if last && end == size {
				return tornAt(off)
			}
			return sc, corrupt(off, "record checksum mismatch")
		}
		n, err := r.applyRecord(name, off+frameHeadSize, p)
		if err != nil {
			return sc, err
		}
		sc.records++
		sc.rows += n
		off = end
	}
	sc.goodEnd = off
	return sc, nil
}

// applyRecord decodes one checksummed log record payload p (found at offset
// base of file name) and applies its rows.
func (r *recovery) applyRecord(name string, base int64, p []byte) (int, error) {
	corrupt := func(at []byte, format string, args ...any) error {
		return &CorruptError{File: name, Offset: base + int64(len(p)-len(at)), Reason: fmt.Sprintf(format, args...)}
	}
	if len(p) < 8 {
		return 0, corrupt(p, "record payload of %d bytes is shorter than its 8-byte prefix", len(p))
	}
	count := int(binary.LittleEndian.Uint32(p[0:]))
	metaLen := int(binary.LittleEndian.Uint32(p[4:]))
	rest := p[8:]
	if metaLen > len(rest) {
		return 0, corrupt(p[4:], "meta length %d exceeds the record's %d remaining bytes", metaLen, len(rest))
	}
	r.meta = append(r.meta[:0], rest[:metaLen]...)
	rest = rest[metaLen:]
	n, err := r.applyRows(name, base+int64(len(p)-len(rest)), rest, count)
	if err != nil {
		return n, err
	}
	return n, nil
}

// zeroFrom reports whether bytes [off, size) of f are all zero: space a file
// system allocated for a final write whose data never arrived.
func zeroFrom(f *os.File, off, size int64) bool {
	var b [4096]byte
	for off < size {
		n := int64(len(b))
		if size-off < n {
			n = size - off
		}
		if _, err := f.ReadAt(b[:n], off); err != nil {
			return false
		}
		for _, c := range b[:n] {
			if c != 0 {
				return false
			}
		}
		off += n
	}
	return true
}
