package kafka

import (
	"slices"
	"sync"

	"freshet.dev/freshet/stream"
)

// planCommit returns the offsets to commit for a trainer position: for each
// partition in owned, pos's next offset, capped so it never passes the
// lowest dead-lettered offset still waiting for its acknowledgement (the
// record at that offset is then read again after a restart, never lost), and
// left out when it would not move past the last committed value. held
// reports the lowest unacknowledged dead-letter offset of a partition.
func planCommit(pos []stream.PartitionOffset, owned map[int32]*partState, committed map[int32]int64,
	held func(p int32) (int64, bool)) map[int]int64 {
	var plan map[int]int64
	for _, po := range pos {
		if _, ok := owned[po.Partition]; !ok {
			continue
		}
		next := po.Next
		if low, ok := held(po.Partition); ok && low < next {
			next = low
		}
		if c, ok := committed[po.Partition]; ok && next <= c {
			continue
		}
		if next < 0 {
			continue
		}
		if plan == nil {
			plan = make(map[int]int64, len(pos))
		}
		plan[int(po.Partition)] = next
	}
	return plan
}

// setNext records next as partition p's next offset in ps, which is sorted by
// partition, and returns the updated slice. It allocates only when p is new.
func setNext(ps []stream.PartitionOffset, p int32, next int64) []stream.PartitionOffset {
	i, found := slices.BinarySearchFunc(ps, p, func(po stream.PartitionOffset, p int32) int {
		return int(po.Partition) - int(p)
	})
	if found {
		ps[i].Next = next
		return ps
	}
	return slices.Insert(ps, i, stream.PartitionOffset{Partition: p, Next: next})
}

// lookupNext returns partition p's next offset in the sorted ps.
func lookupNext(ps []stream.PartitionOffset, p int32) (int64, bool) {
	i, found := slices.BinarySearchFunc(ps, p, func(po stream.PartitionOffset, p int32) int {
		return int(po.Partition) - int(p)
	})
	if !found {
		return 0, false
	}
	return ps[i].Next, true
}

// startKind says how a worker's first offset was chosen.
type startKind uint8

const (
	startDelivered  startKind = iota // the trainer's position, held without a break
	startCommitted                   // the group's committed offset
	startConfigured                  // Options.Start: nothing is known yet
)

func (k startKind) String() string {
	switch k {
	case startDelivered:
		return "position"
	case startCommitted:
		return "committed"
	}
	return "configured start"
}

// chooseStart picks a partition's first offset for a new generation.
// delivered is the trainer's next offset (hasDelivered false when it has none);
// continuous says this source held the partition since that offset was
// recorded (restored checkpoint, or owned in the previous generation);
// committed is the group's committed offset, negative when none.
//
// A position held without a break wins: it is exactly what the model has
// seen, even when it is behind the committed offset (an older checkpoint
// restored: its later records are read again). Otherwise another member may
// have read the partition meanwhile, and the later of the two is taken.
func chooseStart(delivered int64, hasDelivered, continuous bool, committed int64) (int64, startKind) {
	switch {
	case hasDelivered && continuous:
		return delivered, startDelivered
	case committed >= 0 && hasDelivered && delivered > committed:
		return delivered, startDelivered
	case committed >= 0:
		return committed, startCommitted
	case hasDelivered:
		return delivered, startDelivered
	}
	return -1, startConfigured
}

// pending tracks, per source partition, the dead-lettered offsets whose write
// has not been acknowledged. It is safe for concurrent use.
type pending struct {
	mu sync.Mutex
	m  map[int32][]int64
}

func newPending() *pending { return &pending{m: make(map[int32][]int64)} }

// add records offset off of partition p as waiting.
func (t *pending) add(p int32, off int64) {
	t.mu.Lock()
	t.m[p] = append(t.m[p], off)
	t.mu.Unlock()
}

// ack forgets one waiting entry for offset off of partition p.
func (t *pending) ack(p int32, off int64) {
	t.mu.Lock()
	l := t.m[p]
	if i := slices.Index(l, off); i >= 0 {
		l = slices.Delete(l, i, i+1)
		if len(l) == 0 {
			delete(t.m, p)
		} else {
			t.m[p] = l
		}
	}
	t.mu.Unlock()
}

// lowest returns the lowest waiting offset of partition p.
func (t *pending) lowest(p int32) (int64, bool) {
	t.mu.Lock()
	defer t.mu.Unlock()
	l := t.m[p]
	if len(l) == 0 {
		return 0, false
	}
	return slices.Min(l), true
}

// count returns the number of waiting entries.
func (t *pending) count() int {
	t.mu.Lock()
	defer t.mu.Unlock()
	n := 0
	for _, l := range t.m {
		n += len(l)
	}
	return n
}
