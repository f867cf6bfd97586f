package checkpoint

import (
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"
	"os"
	"path/filepath"
)

// markName is the file Mark writes: how many events the trainer had applied
// at its newest batch boundary.
const markName = "MARK"

// markSize is the record's size: the count (uint64 LE), its CRC-32C, and 4
// bytes of zero padding.
const markSize = 16

// Mark records that the trainer has applied applied events in all, by
// overwriting a 16-byte record in place without fsync. The page cache keeps
// it when the process is killed (it is lost only when the machine is), so
// after a crash Recover can tell exactly how many events were applied
// beyond the newest durable cut, that is, how many the restart applies
// again (RecoverInfo.Reapply). It never affects what is recovered.
//
// Mark may be called from another goroutine than the other methods: it
// uses its own file descriptor and no shared state.
func (s *Store) Mark(applied uint64) error {
	f := s.markF.Load()
	if f == nil {
		var err error
		if f, err = os.OpenFile(filepath.Join(s.dir, markName), os.O_RDWR|os.O_CREATE, 0o640); err != nil {
			return fmt.Errorf("checkpoint: mark: %w", err)
		}
		if !s.markF.CompareAndSwap(nil, f) {
			f.Close()
			f = s.markF.Load()
		}
	}
	var b [markSize]byte
	binary.LittleEndian.PutUint64(b[0:], applied)
	binary.LittleEndian.PutUint32(b[8:], crc32.Checksum(b[:8], castagnoli))
	if _, err := f.WriteAt(b[:], 0); err != nil {
		return fmt.Errorf("checkpoint: mark: %w", err)
	}
	return nil
}

// readMark returns the count of the last Mark, and false when there is no
// valid mark (none written, or the record is damaged).
func (s *Store) readMark() (uint64, bool) {
	f, err := os.Open(filepath.Join(s.dir, markName))
	if err != nil {
		return 0, false
	}
	defer f.Close()
	var b [markSize]byte
	if _, err := io.ReadFull(f, b[:]); err != nil {
		return 0, false
	}
	if crc32.Checksum(b[:8], castagnoli) != binary.LittleEndian.Uint32(b[8:]) {
		return 0, false
	}
	return binary.LittleEndian.Uint64(b[:8]), true
}

// closeMark closes the mark file, if Mark opened it.
func (s *Store) closeMark() error {
	if f := s.markF.Swap(nil); f != nil {
		if err := f.Close(); err != nil && !errors.Is(err, os.ErrClosed) {
			return fmt.Errorf("checkpoint: close mark: %w", err)
		}
	}
	return nil
}
