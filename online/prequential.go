package online

import (
	"encoding/binary"
	"math"
)

// This file holds the running estimators of prequential (test-then-train)
// evaluation: a compensated sum for long-running totals, the fading-factor
// mean and the sliding-window mean of J. Gama, R. Sebastião and P. P.
// Rodrigues, "On evaluating stream learning algorithms", Machine Learning
// 90(3), 2013. None of them reads a clock: they advance once per loss added.

// Neumaier is a compensated running sum (Neumaier's variant of Kahan
// summation, A. Neumaier, ZAMM 54, 1974). Each addition of x does
//
//	t = s + x
//	c += (s − t) + x   if |s| ≥ |x|
//	c += (x − t) + s   otherwise
//	s = t
//
// and the sum is s + c. The error of the result stays near one rounding of
// the true sum however many terms are added, where plain summation loses about
// one rounding per term. Only additions and subtractions are used, so the
// compiler has no multiply to fuse into the compensation. The zero value is an
// empty sum.
type Neumaier struct {
	// S is the running sum and C the running compensation; exported so that
	// the pair can be stored and restored exactly.
	S float64 `json:"s"`
	C float64 `json:"c"`
}

// Add adds x to the sum.
func (k *Neumaier) Add(x float64) {
	t := k.S + x
	// Order the two terms by magnitude (a select, not a branch, so that
	// signed streams whose order flips often cost no mispredictions), then
	// c += (big − t) + small.
	big, small := k.S, x
	if math.Abs(big) < math.Abs(small) {
		big, small = small, big
	}
	k.C += (big - t) + small
	k.S = t
}

// Value returns the compensated sum s + c.
func (k Neumaier) Value() float64 { return k.S + k.C }

// Fading is the fading-factor prequential mean of Gama, Sebastião and
// Rodrigues (2013), section 4.2:
//
//	S_t = L_t + α S_{t−1},   N_t = 1 + α N_{t−1},   P_t = S_t / N_t
//
// with S_0 = N_0 = 0. Each loss added is one step t: the estimate decays once
// per event, never with time. The effective window is about 1/(1 − α) events.
// The zero value has α = 0 (P_t = L_t); use NewFading.
type Fading struct {
	alpha float64
	s, n  float64
}

// NewFading returns an empty fading mean with factor alpha, which must be in
// (0, 1]; alpha = 1 gives the plain running mean. NewFading panics on any
// other alpha (a programmer error; Monitor validates its options first).
func NewFading(alpha float64) Fading {
	if !(alpha > 0 && alpha <= 1) {
		panic("online: fading factor outside (0, 1]")
	}
	return Fading{alpha: alpha}
}

// Add takes one step with loss l.
func (f *Fading) Add(l float64) {
	f.s = l + f.alpha*f.s
	f.n = 1 + f.alpha*f.n
}

// Mean returns P_t, or 0 before the first loss.
func (f *Fading) Mean() float64 {
	if f.n == 0 {
		return 0
	}
	return f.s / f.n
}

// Alpha returns the fading factor α.
func (f *Fading) Alpha() float64 { return f.alpha }

// Weight returns N_t, the total weight of the losses seen (it tends to
// 1/(1 − α)).
func (f *Fading) Weight() float64 { return f.n }

// Window is the sliding-window prequential estimator of Gama, Sebastião and
// Rodrigues (2013), section 4.1, over the last w values x_i (a signed error,
// or a loss):
//
//	Mean       = (1/n) Σ x_i
//	MeanSquare = (1/n) Σ x_i²      (so RMSE = sqrt(MeanSquare) of errors)
//	MeanAbs    = (1/n) Σ |x_i|     (MAE of errors)
//
// over i = max(1, t−w+1) … t, n = min(t, w), the values kept in a ring
// buffer. Each total is a compensated sum (Neumaier) that adds the new value
// and subtracts the one leaving; in addition the totals are recomputed exactly
// from the buffer once every w additions, so round-off can never build up
// however long the stream (O(w) every w steps, O(1) amortised). Add does not
// allocate.
type Window struct {
	buf          []float64
	head         int // index of the oldest value once the buffer is full
	n            int // number of values held, ≤ len(buf)
	sum, sq, abs Neumaier
	since        int // additions since the last exact recomputation
}

// NewWindow returns an empty window of size w ≥ 1. It panics if w < 1 (a
// programmer error; Monitor validates its options first).
func NewWindow(w int) *Window {
	if w < 1 {
		panic("online: window size below 1")
	}
	return &Window{buf: make([]float64, w)}
}

// Add appends x, evicting the oldest value when the window is full. x must be
// finite with a finite square.
func (w *Window) Add(x float64) {
	if w.n < len(w.buf) {
		w.buf[w.n] = x
		w.n++
	} else {
		old := w.buf[w.head]
		w.buf[w.head] = x
		w.head++
		if w.head == len(w.buf) {
			w.head = 0
		}
		w.sum.Add(-old)
		w.sq.Add(-old * old)
		w.abs.Add(-math.Abs(old))
	}
	w.sum.Add(x)
	w.sq.Add(x * x)
	w.abs.Add(math.Abs(x))
	w.since++
	if w.since >= len(w.buf) {
		w.recompute()
	}
}

// recompute replaces the running totals by fresh compensated sums of the
// buffer.
func (w *Window) recompute() {
	var s, q, a Neumaier
	for _, x := range w.buf[:w.n] {
		s.Add(x)
		q.Add(x * x)
		a.Add(math.Abs(x))
	}
	w.sum, w.sq, w.abs = s, q, a
	w.since = 0
}

// Mean returns the mean of the values held, or 0 when the window is empty.
func (w *Window) Mean() float64 { return w.mean(w.sum) }

// MeanSquare returns the mean of the squares of the values held (never
// negative), or 0 when the window is empty.
func (w *Window) MeanSquare() float64 { return max(w.mean(w.sq), 0) }

// MeanAbs returns the mean of the absolute values held (never negative), or
// 0 when the window is empty.
func (w *Window) MeanAbs() float64 { return max(w.mean(w.abs), 0) }

func (w *Window) mean(s Neumaier) float64 {
	if w.n == 0 {
		return 0
	}
	return s.Value() / float64(w.n)
}

// Sum returns the total of the values held.
func (w *Window) Sum() float64 { return w.sum.Value() }

// Len returns the number of values held, at most Cap.
func (w *Window) Len() int { return w.n }

// Cap returns the window size w.
func (w *Window) Cap() int { return len(w.buf) }

// valuesTo appends the values held to dst, oldest first.
func (w *Window) valuesTo(dst []float64) []float64 {
	if w.n < len(w.buf) {
		return append(dst, w.buf[:w.n]...)
	}
	dst = append(dst, w.buf[w.head:]...)
	return append(dst, w.buf[:w.head]...)
}

// windowState is the stored form of a Window: the buffer in storage order
// (as little-endian float64 bits, which JSON carries as base64: exact and
// about 11 bytes a value) with the index of its oldest value, the running
// totals and the phase of the exact recomputation, so that a restored window
// gives bit-identical results.
type windowState struct {
	Size   int      `json:"size"`
	Head   int      `json:"head"`
	Values []byte   `json:"values"`
	Sum    Neumaier `json:"sum"`
	Sq     Neumaier `json:"sq"`
	Abs    Neumaier `json:"abs"`
	Since  int      `json:"since"`
}

func (w *Window) state() windowState {
	b := make([]byte, 0, 8*w.n)
	for _, x := range w.buf[:w.n] {
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(x))
	}
	return windowState{Size: len(w.buf), Head: w.head, Values: b,
		Sum: w.sum, Sq: w.sq, Abs: w.abs, Since: w.since}
}

// checkWindowState reports what is wrong with st, or "" when it is usable.
func checkWindowState(st windowState) string {
	n := len(st.Values) / 8
	switch {
	case st.Size < 1 || st.Size > MaxMonitorWindow:
		return "size out of range"
	case len(st.Values)%8 != 0:
		return "values length not a multiple of 8 bytes"
	case n > st.Size:
		return "holds more values than its size"
	case st.Head < 0 || st.Head >= st.Size || (st.Head != 0 && n < st.Size):
		return "head out of range"
	case st.Since < 0 || st.Since >= st.Size:
		return "since out of range"
	}
	for i := range n {
		x := math.Float64frombits(binary.LittleEndian.Uint64(st.Values[8*i:]))
		if !(math.Abs(x) <= monitorMaxError) {
			return "value out of range"
		}
	}
	return ""
}

// setState restores w from st, which checkWindowState accepted. When st was
// written with another window size, the newest values that fit are kept and
// the totals are recomputed.
func (w *Window) setState(st windowState) {
	vals := make([]float64, len(st.Values)/8)
	for i := range vals {
		vals[i] = math.Float64frombits(binary.LittleEndian.Uint64(st.Values[8*i:]))
	}
	if st.Size == len(w.buf) {
		w.n = copy(w.buf, vals)
		clear(w.buf[w.n:])
		w.head = st.Head
		w.sum, w.sq, w.abs = st.Sum, st.Sq, st.Abs
		w.since = st.Since
		return
	}
	// Put the stored values in age order, then keep the newest that fit.
	old := Window{buf: vals, head: st.Head, n: len(vals)}
	if len(vals) < st.Size {
		old.head = 0
	}
	vals = old.valuesTo(nil)
	if len(vals) > len(w.buf) {
		vals = vals[len(vals)-len(w.buf):]
	}
	w.head = 0
	w.n = copy(w.buf, vals)
	clear(w.buf[w.n:])
	w.recompute()
}

// fadingState is the stored form of a Fading.
type fadingState struct {
	S float64 `json:"s"`
	N float64 `json:"n"`
}

func (f *Fading) state() fadingState      { return fadingState{S: f.s, N: f.n} }
func (f *Fading) setState(st fadingState) { f.s, f.n = st.S, st.N }
