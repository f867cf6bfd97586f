package checkpoint

import (
	"bufio"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"

	"go.uber.org/zap"

	"freshet.dev/freshet/online"
)

// snapWriter is a snapshot being written.
type snapWriter struct {
	gen     uint64
	rank    int
	tmpName string
	f       *os.File
	w       *bufio.Writer
	// block is the rows frame being filled: frame header, count, rows.
	block     []byte
	blockRows int
	// appended is set by an Append after the newest WriteRows: Commit needs
	// one, or the snapshot's rows could be newer than any recorded meta.
	appended bool
	rows     uint64
	blocks   uint64
	// off is the number of bytes handed to w so far.
	off int64
}

const blockPrefix = frameHeadSize + 4

// BeginSnapshot starts a full snapshot at meta and rotates the log: Appends
// from now on go to a new log that belongs to the new snapshot. A snapshot
// still in progress (BeginSnapshot without Commit) is abandoned first.
func (s *Store) BeginSnapshot(meta *online.Meta) error {
	if err := s.usable(); err != nil {
		return err
	}
	if meta == nil {
		return errors.New("checkpoint: begin snapshot: meta is nil")
	}
	k := meta.Rank
	if k <= 0 || k > maxRank {
		return fmt.Errorf("checkpoint: begin snapshot: meta rank %d out of range [1, %d]", k, maxRank)
	}
	if s.rank != 0 && k != s.rank {
		return fmt.Errorf("checkpoint: begin snapshot: meta rank %d differs from the log's rank %d", k, s.rank)
	}
	if s.snap != nil {
		s.log.Warn("snapshot abandoned: a new one begins", zap.String("file", s.snap.tmpName))
		if err := s.abandonSnapshot(); err != nil {
			return err
		}
	}
	gen := s.gen + 1
	// The new log is durable before the snapshot exists: recovery from the
	// old snapshot then sees the old logs followed by this one.
	if err := s.startLog(gen, k); err != nil {
		return err
	}
	name := fmt.Sprintf("snap-%010d.tmp", gen)
	f, err := os.OpenFile(filepath.Join(s.dir, name), os.O_WRONLY|os.O_CREATE|os.O_TRUNC, 0o640)
	if err != nil {
		return fmt.Errorf("checkpoint: create %s: %w", name, err)
	}
	sw := &snapWriter{gen: gen, rank: k, tmpName: name, f: f, w: bufio.NewWriterSize(f, snapBufferSize)}
	if cap(s.block) < snapBlockSize+blockPrefix {
		s.block = make([]byte, 0, snapBlockSize+blockPrefix)
	}
	sw.block = s.block[:blockPrefix]
	s.snap = sw
	hdr := putFileHeader(nil, fileHeader{magic: snapMagic, rank: k, gen: gen, aux: meta.Seq})
	if err := sw.write(hdr); err != nil {
		return s.failSnapshot(err)
	}
	return nil
}

// WriteRows adds a chunk of live rows to the snapshot in progress. Rows are
// copied into checksummed blocks; WriteRows allocates nothing once its
// buffers have grown. A write error abandons the snapshot.
func (s *Store) WriteRows(rows *online.RowSet) error {
	if s.closed {
		return ErrClosed
	}
	sw := s.snap
	if sw == nil {
		return ErrNoSnapshot
	}
	if rows == nil || rows.Len() == 0 {
		return nil
	}
	if rows.Rank != sw.rank {
		return fmt.Errorf("checkpoint: write rows: row set rank %d differs from snapshot rank %d", rows.Rank, sw.rank)
	}
	// Check the whole chunk first, so that a bad record leaves the snapshot
	// as it was.
	for i := range rows.Recs {
		rec := &rows.Recs[i]
		if why := checkRow(rec, sw.rank); why != "" {
			return fmt.Errorf("checkpoint: write rows: record %d (%s row %d): %s", i, rec.Side, rec.Row, why)
		}
	}
	for i := range rows.Recs {
		rec := &rows.Recs[i]
		if sw.blockRows > 0 && len(sw.block)+rowSize(rec, sw.rank) > cap(sw.block) {
			if err := sw.flushBlock(); err != nil {
				return s.failSnapshot(err)
			}
		}
		sw.block = appendRow(sw.block, rec)
		sw.blockRows++
		sw.appended = false
		if cap(sw.block) > cap(s.block) {
			s.block = sw.block[:0] // a row larger than a block grew it; keep the bigger buffer
		}
	}
	return nil
}

// Commit completes the snapshot in progress with meta, which must be the
// meta of an Append made after the last WriteRows (else Commit refuses and
// the snapshot stays open). It writes the meta and the trailer,
// fsyncs, renames the file into place, fsyncs the directory, and then deletes
// snapshots beyond Keep and the logs no kept snapshot needs.
func (s *Store) Commit(meta *online.Meta) error {
	if s.closed {
		return ErrClosed
	}
	sw := s.snap
	if sw == nil {
		return ErrNoSnapshot
	}
	if meta == nil {
		return errors.New("checkpoint: commit: meta is nil")
	}
	if meta.Rank != sw.rank {
		return fmt.Errorf("checkpoint: commit: meta rank %d differs from snapshot rank %d", meta.Rank, sw.rank)
	}
	// Protocol step 3: the rows plus the logs must give the state at meta.
	// Both errors leave the snapshot open: Append, then Commit again.
	if !sw.appended {
		return errors.New("checkpoint: commit: no Append since the last WriteRows; append, then commit with that meta")
	}
	if meta.Seq != s.lastSeq {
		return fmt.Errorf("checkpoint: commit: meta seq %d is not the seq %d of the last Append", meta.Seq, s.lastSeq)
	}
	mj, err := json.Marshal(meta)
	if err != nil {
		return fmt.Errorf("checkpoint: commit: encode meta: %w", err)
	}
	if sw.blockRows > 0 {
		if err := sw.flushBlock(); err != nil {
			return s.failSnapshot(err)
		}
	}
	metaOff := sw.off
	var fh [frameHeadSize]byte
	putFrameHead(fh[:], tagMeta, mj)
	if err := sw.write(fh[:]); err != nil {
		return s.failSnapshot(err)
	}
	if err := sw.write(mj); err != nil {
		return s.failSnapshot(err)
	}
	var end [frameHeadSize + endPayloadSize]byte
	binary.LittleEndian.PutUint64(end[frameHeadSize:], sw.rows)
	binary.LittleEndian.PutUint64(end[frameHeadSize+8:], sw.blocks)
	binary.LittleEndian.PutUint64(end[frameHeadSize+16:], uint64(metaOff))
	putFrameHead(end[:], tagEnd, end[frameHeadSize:])
	if err := sw.write(end[:]); err != nil {
		return s.failSnapshot(err)
	}
	if err := sw.w.Flush(); err != nil {
		return s.failSnapshot(fmt.Errorf("checkpoint: write %s: %w", sw.tmpName, err))
	}
	if err := sw.f.Sync(); err != nil {
		return s.failSnapshot(fmt.Errorf("checkpoint: sync %s: %w", sw.tmpName, err))
	}
	err = sw.f.Close()
	sw.f = nil
	if err != nil {
		return s.failSnapshot(fmt.Errorf("checkpoint: close %s: %w", sw.tmpName, err))
	}
	final := snapName(sw.gen)
	if err := os.Rename(filepath.Join(s.dir, sw.tmpName), filepath.Join(s.dir, final)); err != nil {
		return s.failSnapshot(fmt.Errorf("checkpoint: rename %s to %s: %w", sw.tmpName, final, err))
	}
	s.snap = nil
	if err := s.syncDir(); err != nil {
		return err
	}
	s.log.Info("snapshot committed", zap.String("file", final), zap.Uint64("rows", sw.rows),
		zap.Int64("bytes", sw.off), zap.Uint64("seq", meta.Seq))
	s.prune()
	return nil
}

// prune deletes snapshots beyond the newest Keep and the logs older than the
// oldest kept snapshot. A failure is logged, not returned: the new snapshot
// is already durable and recovery ignores leftovers.
func (s *Store) prune() { s.pruneKeeping(s.keep) }

// Purge deletes every snapshot but the newest and every log older than it,
// whatever Keep says: after a privacy erasure, once a snapshot taken after
// it is committed, no file in the directory holds the erased rows or the
// log record that named the erased ID (the newest snapshot keeps only a
// digest of it). It is a no-op without a committed snapshot.
func (s *Store) Purge() error {
	if s.closed {
		return ErrClosed
	}
	s.pruneKeeping(1)
	return nil
}

func (s *Store) pruneKeeping(keep int) {
	l, err := s.list()
	if err != nil {
		s.log.Warn("prune: list directory", zap.Error(err))
		return
	}
	if len(l.snaps) == 0 {
		return
	}
	cut := len(l.snaps) - keep
	if cut < 0 {
		cut = 0
	}
	oldest := l.snaps[cut]
	for _, g := range l.snaps[:cut] {
		s.remove(snapName(g))
	}
	for _, g := range l.logs {
		if g < oldest {
			s.remove(logName(g))
		}
	}
	if err := s.syncDir(); err != nil {
		s.log.Warn("prune: sync directory", zap.Error(err))
	}
}

func (s *Store) remove(name string) {
	if err := os.Remove(filepath.Join(s.dir, name)); err != nil && !errors.Is(err, os.ErrNotExist) {
		s.log.Warn("prune: remove file", zap.String("file", name), zap.Error(err))
	}
}

// failSnapshot abandons the snapshot in progress after err.
func (s *Store) failSnapshot(err error) error {
	return errors.Join(err, s.abandonSnapshot())
}

// abandonSnapshot closes and removes the snapshot in progress. The log it
// rotated to stays: recovery reads it after the older logs.
func (s *Store) abandonSnapshot() error {
	sw := s.snap
	if sw == nil {
		return nil
	}
	s.snap = nil
	var errs []error
	if sw.f != nil {
		errs = append(errs, sw.f.Close())
	}
	if err := os.Remove(filepath.Join(s.dir, sw.tmpName)); err != nil && !errors.Is(err, os.ErrNotExist) {
		errs = append(errs, fmt.Errorf("checkpoint: remove %s: %w", sw.tmpName, err))
	}
	return errors.Join(errs...)
}

func (sw *snapWriter) write(p []byte) error {
	n, err := sw.w.Write(p)
	sw.off += int64(n)
	if err != nil {
		return fmt.Errorf("checkpoint: write %s: %w", sw.tmpName, err)
	}
	return nil
}

// flushBlock frames the rows collected in sw.block and writes them.
func (sw *snapWriter) flushBlock() error {
	binary.LittleEndian.PutUint32(sw.block[frameHeadSize:], uint32(sw.blockRows))
	putFrameHead(sw.block, tagRows, sw.block[frameHeadSize:])
	if err := sw.write(sw.block); err != nil {
		return err
	}
	sw.rows += uint64(sw.blockRows)
	sw.blocks++
	sw.block = sw.block[:blockPrefix]
	sw.blockRows = 0
	return nil
}

// readSnapshot reads snap-<gen>.bin, checking every checksum and the
// trailer. With apply set it calls r.apply for every row; without, it only
// verifies. It sets r's rank from the header and leaves the meta JSON in
// r.meta. Damage is a *CorruptError.
func (r *recovery) readSnapshot(gen uint64, apply bool) (int, error) {
	name := snapName(gen)
	f, err := os.Open(filepath.Join(r.s.dir, name))
	if err != nil {
		return 0, fmt.Errorf("checkpoint: open %s: %w", name, err)
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return 0, fmt.Errorf("checkpoint: stat %s: %w", name, err)
	}
	size := st.Size()
	corrupt := func(off int64, format string, args ...any) error {
		return &CorruptError{File: name, Offset: off, Reason: fmt.Sprintf(format, args...)}
	}
	if size < fileHeaderSize {
		return 0, corrupt(0, "file is %d bytes, shorter than its %d-byte header", size, fileHeaderSize)
	}
	br := newReader(f)
	var hb [fileHeaderSize]byte
	if _, err := io.ReadFull(br, hb[:]); err != nil {
		return 0, fmt.Errorf("checkpoint: read %s: %w", name, err)
	}
	h, why := parseFileHeader(hb[:], snapMagic)
	if why != "" {
		return 0, corrupt(0, "%s", why)
	}
	if h.gen != gen {
		return 0, corrupt(16, "header says generation %d, file name says %d", h.gen, gen)
	}
	r.setRank(h.rank)
	fn := r.apply
	if !apply {
		fn = nil
	}

	off := int64(fileHeaderSize)
	rows, blocks := 0, 0
	metaOff := int64(-1)
	var fh [frameHeadSize]byte
	for {
		if size-off < frameHeadSize {
			return rows, corrupt(off, "no trailer: the snapshot is incomplete")
		}
		if _, err := io.ReadFull(br, fh[:]); err != nil {
			return rows, fmt.Errorf("checkpoint: read %s: %w", name, err)
		}
		head, ok := parseFrameHead(fh[:])
		if !ok {
			return rows, corrupt(off, "frame header checksum mismatch")
		}
		end := off + frameHeadSize + head.length
		if end > size {
			return rows, corrupt(off, "frame of %d bytes runs past end of file", head.length)
		}
		p := r.payload(int(head.length))
		if _, err := io.ReadFull(br, p); err != nil {
			return rows, fmt.Errorf("checkpoint: read %s: %w", name, err)
		}
		if checksum(p) != head.crc {
			return rows, corrupt(off, "frame checksum mismatch")
		}
		switch head.tag {
		case tagRows:
			if metaOff >= 0 {
				return rows, corrupt(off, "rows block after the meta")
			}
			if len(p) < 4 {
				return rows, corrupt(off, "rows block of %d bytes has no count", len(p))
			}
			n, err := r.applyRowsWith(fn, name, off+blockPrefix, p[4:], int(binary.LittleEndian.Uint32(p)))
			rows += n
			if err != nil {
				return rows, err
			}
			blocks++
		case tagMeta:
			if metaOff >= 0 {
				return rows, corrupt(off, "second meta frame")
			}
			metaOff = off
			r.meta = append(r.meta[:0], p...)
		case tagEnd:
			if len(p) != endPayloadSize {
				return rows, corrupt(off, "trailer of %d bytes, want %d", len(p), endPayloadSize)
			}
			wr := binary.LittleEndian.Uint64(p[0:])
			wb := binary.LittleEndian.Uint64(p[8:])
			wm := int64(binary.LittleEndian.Uint64(p[16:]))
			switch {
			case metaOff < 0:
				return rows, corrupt(off, "trailer without a meta frame")
			case wr != uint64(rows) || wb != uint64(blocks):
				return rows, corrupt(off, "trailer counts %d rows in %d blocks, file holds %d in %d", wr, wb, rows, blocks)
			case wm != metaOff:
				return rows, corrupt(off, "trailer puts the meta at offset %d, found at %d", wm, metaOff)
			case end != size:
				return rows, corrupt(end, "%d bytes after the trailer", size-end)
			}
			return rows, nil
		default:
			return rows, corrupt(off, "unknown frame tag %#x", head.tag)
		}
		off = end
	}
}
