package checkpoint

import (
	"encoding/binary"
	"fmt"
	"hash/crc32"
	"math"
	"unsafe"

	"freshet.dev/freshet/online"
)

// On-disk encoding. Everything is little-endian.
//
// File header (both kinds of file), fileHeaderSize bytes:
//
//	0  magic    [8]byte  snapMagic or logMagic
//	8  version  uint32   formatVersion
//	12 rank     uint32   k, the length of every vector in the file
//	16 gen      uint64   generation: the number in the file name
//	24 aux      uint64   snapshot: Seq of the BeginSnapshot meta; log: 0
//	32 crc      uint32   CRC-32C of bytes 0..32
//
// After the header come frames. A frame is a 16-byte header and a payload:
//
//	0  tag      uint32   tagRows, tagMeta, tagEnd (snapshots) or tagRecord (logs)
//	4  length   uint32   payload length in bytes
//	8  crcData  uint32   CRC-32C of the payload
//	12 crcHead  uint32   CRC-32C of bytes 0..12 of the frame header
//
// The header has its own checksum so that a length can be trusted before the
// payload is read: a torn last log record is then told apart from a damaged
// length in the middle of a log.
//
// Payloads:
//
//	tagRows    count uint32, then count rows
//	tagMeta    JSON of online.Meta (the Commit meta)
//	tagEnd     rows uint64, blocks uint64, metaOffset uint64 (snapshot trailer;
//	           the file ends right after it)
//	tagRecord  count uint32, metaLen uint32, metaLen bytes of online.Meta JSON,
//	           then count rows
//
// A row, rowFixedSize bytes then the ID, then (unless deleted) k float32:
//
//	0  side   uint8
//	1  flags  uint8    flagDeleted
//	2  idLen  uint16
//	4  row    int32
//	8  bias   float32 (IEEE 754 bits)
//	12 count  uint32
//	16 last   int64
//	24 epoch  uint32
//	28 id     idLen bytes
//	   vec    k × float32 (IEEE 754 bits), absent when deleted
//
// A log record is self-contained (its rows and its meta), so a later
// compaction can rewrite a log record by record, leaving out rows with a given
// ID, and recompute the checksums without touching anything else.
const (
	formatVersion  = 1
	fileHeaderSize = 36
	frameHeadSize  = 16
	rowFixedSize   = 28

	tagRows   = 0x52 // 'R'
	tagMeta   = 0x4d // 'M'
	tagEnd    = 0x45 // 'E'
	tagRecord = 0x4c // 'L'

	flagDeleted = 1

	endPayloadSize = 24
	// maxIDLen is the longest ID the row encoding can hold.
	maxIDLen = math.MaxUint16
	// maxRank bounds k when reading, so a damaged header cannot make recovery
	// allocate without limit.
	maxRank = 1 << 16
)

var (
	snapMagic = [8]byte{'F', 'R', 'S', 'H', 'S', 'N', 'A', 'P'}
	logMagic  = [8]byte{'F', 'R', 'S', 'H', 'L', 'O', 'G', '1'}

	castagnoli = crc32.MakeTable(crc32.Castagnoli)
)

func checksum(p []byte) uint32 { return crc32.Checksum(p, castagnoli) }

// fileHeader is the decoded header of a snapshot or log file.
type fileHeader struct {
	magic [8]byte
	rank  int
	gen   uint64
	aux   uint64
}

func putFileHeader(dst []byte, h fileHeader) []byte {
	var b [fileHeaderSize]byte
	copy(b[0:8], h.magic[:])
	binary.LittleEndian.PutUint32(b[8:], formatVersion)
	binary.LittleEndian.PutUint32(b[12:], uint32(h.rank))
	binary.LittleEndian.PutUint64(b[16:], h.gen)
	binary.LittleEndian.PutUint64(b[24:], h.aux)
	binary.LittleEndian.PutUint32(b[32:], checksum(b[:32]))
	return append(dst, b[:]...)
}

// parseFileHeader checks b (fileHeaderSize bytes) against the expected magic
// and returns the header, or a reason it is unusable.
func parseFileHeader(b []byte, magic [8]byte) (fileHeader, string) {
	var h fileHeader
	if checksum(b[:32]) != binary.LittleEndian.Uint32(b[32:]) {
		return h, "file header checksum mismatch"
	}
	copy(h.magic[:], b[0:8])
	if h.magic != magic {
		return h, fmt.Sprintf("bad magic %q", h.magic[:])
	}
	if v := binary.LittleEndian.Uint32(b[8:]); v != formatVersion {
		return h, fmt.Sprintf("unsupported format version %d (this build reads %d)", v, formatVersion)
	}
	r := binary.LittleEndian.Uint32(b[12:])
	if r == 0 || r > maxRank {
		return h, fmt.Sprintf("rank %d out of range", r)
	}
	h.rank = int(r)
	h.gen = binary.LittleEndian.Uint64(b[16:])
	h.aux = binary.LittleEndian.Uint64(b[24:])
	return h, ""
}

// putFrameHead fills the frame header at dst[0:frameHeadSize] for payload.
func putFrameHead(dst []byte, tag uint32, payload []byte) {
	binary.LittleEndian.PutUint32(dst[0:], tag)
	binary.LittleEndian.PutUint32(dst[4:], uint32(len(payload)))
	binary.LittleEndian.PutUint32(dst[8:], checksum(payload))
	binary.LittleEndian.PutUint32(dst[12:], checksum(dst[:12]))
}

// frameHead is a decoded frame header.
type frameHead struct {
	tag    uint32
	length int64
	crc    uint32
}

// parseFrameHead decodes b[0:frameHeadSize]; ok is false when its checksum
// does not match.
func parseFrameHead(b []byte) (frameHead, bool) {
	if checksum(b[:12]) != binary.LittleEndian.Uint32(b[12:]) {
		return frameHead{}, false
	}
	return frameHead{
		tag:    binary.LittleEndian.Uint32(b[0:]),
		length: int64(binary.LittleEndian.Uint32(b[4:])),
		crc:    binary.LittleEndian.Uint32(b[8:]),
	}, true
}

// rowSize returns the encoded size of rec at rank k.
func rowSize(rec *online.RowRecord, k int) int {
	n := rowFixedSize + len(rec.ID)
	if !rec.Deleted {
		n += 4 * k
	}
	return n
}

// checkRow reports why rec cannot be written at rank k, or "" when it can.
func checkRow(rec *online.RowRecord, k int) string {
	if rec.Side != online.Users && rec.Side != online.Items {
		return fmt.Sprintf("side %d is neither users nor items", rec.Side)
	}
	if len(rec.ID) > maxIDLen {
		return fmt.Sprintf("id is %d bytes, longer than %d", len(rec.ID), maxIDLen)
	}
	if !rec.Deleted && len(rec.Vec) != k {
		return fmt.Sprintf("vector has %d factors, want rank %d", len(rec.Vec), k)
	}
	return ""
}

// appendRow encodes rec (already checked by checkRow) onto dst. It allocates
// only when dst must grow.
func appendRow(dst []byte, rec *online.RowRecord) []byte {
	var flags uint8
	if rec.Deleted {
		flags = flagDeleted
	}
	var b [rowFixedSize]byte
	b[0] = uint8(rec.Side)
	b[1] = flags
	binary.LittleEndian.PutUint16(b[2:], uint16(len(rec.ID)))
	binary.LittleEndian.PutUint32(b[4:], uint32(rec.Row))
	binary.LittleEndian.PutUint32(b[8:], math.Float32bits(rec.Bias))
	binary.LittleEndian.PutUint32(b[12:], rec.Count)
	binary.LittleEndian.PutUint64(b[16:], uint64(rec.Last))
	binary.LittleEndian.PutUint32(b[24:], rec.Epoch)
	dst = append(dst, b[:]...)
	dst = append(dst, rec.ID...)
	if rec.Deleted {
		return dst
	}
	if littleEndian && len(rec.Vec) > 0 {
		// The in-memory float32s are already the wire bytes.
		return append(dst, unsafe.Slice((*byte)(unsafe.Pointer(&rec.Vec[0])), 4*len(rec.Vec))...)
	}
	n := len(dst)
	dst = grow(dst, 4*len(rec.Vec))
	v := dst[n:]
	for i, x := range rec.Vec {
		binary.LittleEndian.PutUint32(v[4*i:], math.Float32bits(x))
	}
	return dst
}

// littleEndian reports whether this machine stores numbers little-endian, as
// the files do; then vectors are copied as bytes instead of one by one.
var littleEndian = func() bool {
	x := uint16(1)
	return *(*byte)(unsafe.Pointer(&x)) == 1
}()

// grow extends len(b) by n, reallocating only when the capacity is short.
func grow(b []byte, n int) []byte {
	if cap(b)-len(b) < n {
		nb := make([]byte, len(b), 2*cap(b)+n)
		copy(nb, b)
		b = nb
	}
	return b[:len(b)+n]
}

// rowDecoder decodes rows from a payload into one reused RowRecord.
type rowDecoder struct {
	rank int
	rec  online.RowRecord
	vec  []float32
}

func (d *rowDecoder) setRank(k int) {
	d.rank = k
	if cap(d.vec) < k {
		d.vec = make([]float32, k)
	}
	d.vec = d.vec[:k]
}

// decode reads one row from p and returns the bytes after it, or a reason the
// row is malformed. The record's ID aliases p; its Vec is the decoder's own
// buffer, overwritten by the next call.
func (d *rowDecoder) decode(p []byte) ([]byte, string) {
	if len(p) < rowFixedSize {
		return nil, fmt.Sprintf("row truncated: %d bytes left, want at least %d", len(p), rowFixedSize)
	}
	r := &d.rec
	side := p[0]
	if side > uint8(online.Items) {
		return nil, fmt.Sprintf("row side %d is neither users nor items", side)
	}
	flags := p[1]
	if flags&^flagDeleted != 0 {
		return nil, fmt.Sprintf("row has unknown flags %#x", flags)
	}
	idLen := int(binary.LittleEndian.Uint16(p[2:]))
	r.Side = online.Side(side)
	r.Deleted = flags&flagDeleted != 0
	r.Row = int32(binary.LittleEndian.Uint32(p[4:]))
	r.Bias = math.Float32frombits(binary.LittleEndian.Uint32(p[8:]))
	r.Count = binary.LittleEndian.Uint32(p[12:])
	r.Last = int64(binary.LittleEndian.Uint64(p[16:]))
	r.Epoch = binary.LittleEndian.Uint32(p[24:])
	p = p[rowFixedSize:]
	if len(p) < idLen {
		return nil, fmt.Sprintf("row id truncated: %d bytes left, want %d", len(p), idLen)
	}
	r.ID = p[:idLen:idLen]
	if idLen == 0 {
		r.ID = nil
	}
	p = p[idLen:]
	if r.Deleted {
		r.Vec = nil
		return p, ""
	}
	if len(p) < 4*d.rank {
		return nil, fmt.Sprintf("row vector truncated: %d bytes left, want %d", len(p), 4*d.rank)
	}
	if littleEndian && d.rank > 0 {
		copy(unsafe.Slice((*byte)(unsafe.Pointer(&d.vec[0])), 4*d.rank), p)
	} else {
		for i := range d.vec {
			d.vec[i] = math.Float32frombits(binary.LittleEndian.Uint32(p[4*i:]))
		}
	}
	r.Vec = d.vec
	return p[4*d.rank:], ""
}
