package serving

import (
	"bytes"

	"freshet.dev/freshet/online"
)

// pending is a coalescing table of rows waiting to be written: one entry per
// (side, row), holding the newest copy offered. Copies live in arenas owned by
// the table, so after warm-up put does not allocate.
type pending struct {
	k    int
	slot [2][]int32 // row -> index+1 into recs; 0 = none
	recs []prec
	vecs []float32
	ids  []byte
	dels []pdel
}

// prec is one pending row write.
type prec struct {
	side   online.Side
	dead   bool // erased after being queued: skip
	row    int32
	idOff  int32
	idLen  int32
	vecOff int32
	bias   float32
	count  uint32
	last   int64
	epoch  uint32
	since  int64 // wall time (ns) the row was first dirtied since its last write
}

// pdel is one pending erasure.
type pdel struct {
	side  online.Side
	idOff int32
	idLen int32
}

func newPending(k int) *pending { return &pending{k: k} }

// rows returns the number of pending row writes (dead ones included).
func (p *pending) rows() int { return len(p.recs) }

func (p *pending) empty() bool { return len(p.recs) == 0 && len(p.dels) == 0 }

func (p *pending) id(off, n int32) []byte { return p.ids[off : off+n : off+n] }

func (p *pending) vec(r *prec) []float32 {
	return p.vecs[r.vecOff : int(r.vecOff)+p.k : int(r.vecOff)+p.k]
}

func (p *pending) addID(id []byte) (int32, int32) {
	off := len(p.ids)
	p.ids = append(p.ids, id...)
	return int32(off), int32(len(id))
}

// put queues rec, replacing an older copy of the same (side, row). since is
// kept from the older copy when the ID is the same (the row has stayed dirty).
func (p *pending) put(rec *online.RowRecord, since int64) {
	if rec.Deleted {
		p.del(rec.Side, rec.Row, rec.ID)
		return
	}
	if len(rec.Vec) != p.k || rec.Row < 0 {
		return // the caller validated; defensive
	}
	s := rec.Side & 1
	tab := p.slot[s]
	if int(rec.Row) >= len(tab) {
		n := 2*len(tab) + 1024
		if n <= int(rec.Row) {
			n = int(rec.Row) + 1024
		}
		grown := make([]int32, n)
		copy(grown, tab)
		p.slot[s], tab = grown, grown
	}
	if i := tab[rec.Row]; i > 0 {
		r := &p.recs[i-1]
		if r.dead || !bytes.Equal(p.id(r.idOff, r.idLen), rec.ID) {
			r.idOff, r.idLen = p.addID(rec.ID)
			r.since = since
			r.dead = false
		}
		copy(p.vec(r), rec.Vec)
		r.bias, r.count, r.last, r.epoch = rec.Bias, rec.Count, rec.Last, rec.Epoch
		return
	}
	r := prec{side: s, row: rec.Row, bias: rec.Bias, count: rec.Count, last: rec.Last, epoch: rec.Epoch, since: since}
	r.idOff, r.idLen = p.addID(rec.ID)
	r.vecOff = int32(len(p.vecs))
	p.vecs = append(p.vecs, rec.Vec...)
	p.recs = append(p.recs, r)
	tab[rec.Row] = int32(len(p.recs))
}

// del queues the erasure of id and drops a pending write of it.
func (p *pending) del(side online.Side, row int32, id []byte) {
	s := side & 1
	if row >= 0 && int(row) < len(p.slot[s]) {
		if i := p.slot[s][row]; i > 0 {
			r := &p.recs[i-1]
			if bytes.Equal(p.id(r.idOff, r.idLen), id) {
				r.dead = true
			}
		}
	}
	d := pdel{side: s}
	d.idOff, d.idLen = p.addID(id)
	p.dels = append(p.dels, d)
}

// reset empties p, keeping its buffers.
func (p *pending) reset(k int) {
	for i := range p.recs {
		r := &p.recs[i]
		p.slot[r.side][r.row] = 0
	}
	p.k = k
	p.recs = p.recs[:0]
	p.vecs = p.vecs[:0]
	p.ids = p.ids[:0]
	p.dels = p.dels[:0]
}

// mergeOlder puts back the entries of old (taken out earlier, now failed to
// write) wherever p has no newer copy of the same row, and its erasures.
func (p *pending) mergeOlder(old *pending) {
	var rec online.RowRecord
	for i := range old.recs {
		r := &old.recs[i]
		if r.dead {
			continue
		}
		if int(r.row) < len(p.slot[r.side]) && p.slot[r.side][r.row] > 0 {
			continue
		}
		rec = online.RowRecord{Side: r.side, Row: r.row, ID: old.id(r.idOff, r.idLen), Bias: r.bias,
			Count: r.count, Last: r.last, Epoch: r.epoch, Vec: old.vec(r)}
		p.put(&rec, r.since)
	}
	for _, d := range old.dels {
		id := old.id(d.idOff, d.idLen)
		off, n := p.addID(id)
		p.dels = append(p.dels, pdel{side: d.side, idOff: off, idLen: n})
	}
}
