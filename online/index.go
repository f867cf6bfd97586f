package online

import (
	"bytes"
	"hash/maphash"
	"unsafe"
)

// index maps string IDs to rows and rows back to IDs without a Go map and
// without pointers the collector must scan:
//
//   - arena: ID bytes, in 1 MiB chunks (an ID never spans two; IDs are at
//     most stream.MaxIDLen bytes), appended and never moved;
//   - refs: per row, the ID's place in the arena packed as off<<16 | len
//     (0 = no ID);
//   - slots: an open-addressing hash table with linear probing. A slot packs
//     a 32-bit hash fingerprint (high half) and row+1 (low half); 0 is empty.
//     The home slot of an entry is fingerprint & mask, so the table can grow
//     (and deletions can shift entries back) without rehashing any ID.
//
// Deletion is by backward shift (Knuth, TAOCP vol. 3, 6.4, Algorithm R), so
// there are no tombstone slots and probe lengths do not degrade under churn.
// The table doubles when it is 3/4 full. Memory is about 8 B of refs, 10.7 to
// 21 B of slots and the ID bytes per ID.
type index struct {
	seed  maphash.Seed
	arena [][]byte
	refs  []uint64
	slots []uint64
	n     int
}

const (
	arenaShift = 20
	arenaChunk = 1 << arenaShift
	minSlots   = 64
)

func newIndex() index {
	return index{seed: maphash.MakeSeed(), slots: make([]uint64, minSlots)}
}

// fp returns the 32-bit fingerprint of id. It is never used as a slot value
// on its own, so any value is allowed.
func (x *index) fp(id []byte) uint32 {
	return uint32(maphash.Bytes(x.seed, id) >> 32)
}

// id returns the ID of row r, or nil. It aliases the arena.
func (x *index) id(r int32) []byte {
	if r < 0 || int(r) >= len(x.refs) {
		return nil
	}
	ref := x.refs[r]
	if ref == 0 {
		return nil
	}
	off, n := ref>>16, ref&0xffff
	c := x.arena[off>>arenaShift]
	o := off & (arenaChunk - 1)
	return c[o : o+n : o+n]
}

// find returns the row of id. It does not allocate.
func (x *index) find(id []byte) (int32, bool) {
	_, r, ok := x.lookup(id)
	return r, ok
}

// lookup returns the slot holding id and its row. It does not allocate.
func (x *index) lookup(id []byte) (slot uint64, row int32, ok bool) {
	f := x.fp(id)
	mask := uint64(len(x.slots) - 1)
	for j := uint64(f) & mask; ; j = (j + 1) & mask {
		s := x.slots[j]
		if s == 0 {
			return 0, -1, false
		}
		if uint32(s>>32) == f {
			r := int32(uint32(s) - 1)
			if bytes.Equal(x.id(r), id) {
				return j, r, true
			}
		}
	}
}

// insert records id at row r. id must be absent and r must have no ID.
func (x *index) insert(id []byte, r int32) {
	if (x.n+1)*4 > len(x.slots)*3 {
		x.resize(2 * len(x.slots))
	}
	x.store(id, r)
	f := x.fp(id)
	mask := uint64(len(x.slots) - 1)
	j := uint64(f) & mask
	for x.slots[j] != 0 {
		j = (j + 1) & mask
	}
	x.slots[j] = uint64(f)<<32 | uint64(uint32(r)+1)
	x.n++
}

// store copies id into the arena and points refs[r] at it.
func (x *index) store(id []byte, r int32) {
	last := len(x.arena) - 1
	if last < 0 || len(x.arena[last])+len(id) > arenaChunk {
		x.arena = append(x.arena, make([]byte, 0, arenaChunk))
		last++
	}
	c := x.arena[last]
	off := uint64(last)<<arenaShift | uint64(len(c))
	x.arena[last] = append(c, id...)
	for int(r) >= len(x.refs) {
		x.refs = append(x.refs, 0)
	}
	x.refs[r] = off<<16 | uint64(len(id))
}

// resize rebuilds the slot table with n slots (a power of two) from the
// stored fingerprints.
func (x *index) resize(n int) {
	old := x.slots
	x.slots = make([]uint64, n)
	mask := uint64(n - 1)
	for _, s := range old {
		if s == 0 {
			continue
		}
		j := (s >> 32) & mask
		for x.slots[j] != 0 {
			j = (j + 1) & mask
		}
		x.slots[j] = s
	}
}

// remove deletes id and returns its row. The ID's bytes are overwritten with
// zeros (an erased ID must not linger in memory); the arena space is not
// reused.
func (x *index) remove(id []byte) (int32, bool) {
	j, r, ok := x.lookup(id)
	if !ok {
		return -1, false
	}
	clear(x.id(r))
	x.refs[r] = 0
	x.deleteSlot(j)
	x.n--
	return r, true
}

// deleteSlot empties slot j and shifts later entries of the probe run back
// so that every entry stays reachable from its home slot.
func (x *index) deleteSlot(j uint64) {
	mask := uint64(len(x.slots) - 1)
	hole := j
	for k := (j + 1) & mask; ; k = (k + 1) & mask {
		s := x.slots[k]
		if s == 0 {
			break
		}
		home := (s >> 32) & mask
		// The entry at k may move to the hole unless its home lies
		// cyclically in (hole, k].
		if (k-home)&mask >= (k-hole)&mask {
			x.slots[hole] = s
			hole = k
		}
	}
	x.slots[hole] = 0
}

// heapBytes returns the bytes the index holds (capacities).
func (x *index) heapBytes() int {
	n := 8*cap(x.refs) + 8*cap(x.slots)
	for _, c := range x.arena {
		n += cap(c)
	}
	return n
}

// Staged prefetching for a group of lookups. A lookup of a known ID makes
// three dependent loads, each a likely cache miss in a large index: its home
// slot, the row's ref, the ID's bytes in the arena. The trainer resolves 32
// IDs per group of events; calling prefetchSlot for all of them, then
// prefetchRef for all, then prefetchBytes for all, then find, overlaps the
// misses of the whole group at each stage instead of taking them one
// lookup at a time. Each stage only issues prefetches (or, without them,
// loads); none changes the index, and a wrong guess costs one wasted line.

// prefetchSlot starts loading the home slot of an ID with fingerprint f.
func (x *index) prefetchSlot(f uint32) {
	j := uint64(f) & uint64(len(x.slots)-1)
	prefetchLine(unsafe.Pointer(&x.slots[j]))
}

// prefetchRef starts loading the ref of the row in the first slot of f's
// probe run whose fingerprint matches (usually the home slot).
func (x *index) prefetchRef(f uint32) {
	if r, ok := x.guess(f); ok && int(r) < len(x.refs) {
		prefetchLine(unsafe.Pointer(&x.refs[r]))
	}
}

// prefetchBytes starts loading the ID bytes of that row.
func (x *index) prefetchBytes(f uint32) {
	if r, ok := x.guess(f); ok {
		if id := x.id(r); len(id) > 0 {
			prefetchLine(unsafe.Pointer(&id[0]))
		}
	}
}

// guess returns the row of the first entry of f's probe run with
// fingerprint f, looking at no more than four slots.
func (x *index) guess(f uint32) (int32, bool) {
	mask := uint64(len(x.slots) - 1)
	j := uint64(f) & mask
	for range 4 {
		s := x.slots[j]
		if s == 0 {
			return -1, false
		}
		if uint32(s>>32) == f {
			return int32(uint32(s) - 1), true
		}
		j = (j + 1) & mask
	}
	return -1, false
}
