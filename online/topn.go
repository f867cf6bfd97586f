package online

import "math"

// rankAbove reports whether item a (score sa) ranks above item b (score sb)
// in the order TopN documents.
func rankAbove(sa float32, a int32, sb float32, b int32) bool {
	na, nb := sa != sa, sb != sb
	switch {
	case na || nb:
		if na != nb {
			return nb
		}
	case sa != sb:
		return sa > sb
	}
	return a < b
}

// TopN returns the n best items of scores (their indices, best first),
// appended to dst[:0]. Fewer are returned when scores has fewer than n
// entries; none when n ≤ 0. Item a ranks above item b when
//
//	score[a] > score[b], or score[a] == score[b] and a < b,
//
// with NaN ranking below every number (−Inf included) and NaNs ordered by
// index among themselves. The order is total, so the result is exact and
// deterministic: ties go to the lower item row.
//
// It keeps a min-heap of the n best seen so far in dst, its root the worst of
// them: each further item is compared with the root and, when it ranks above
// it, replaces the root and sifts down. The heap is finally sorted in place by
// heap sort. Cost O(len(scores) · log n) comparisons; no allocation when
// cap(dst) ≥ min(n, len(scores)).
func TopN(scores []float32, n int, dst []int32) []int32 {
	dst = dst[:0]
	if n <= 0 || len(scores) == 0 {
		return dst
	}
	if n > len(scores) {
		n = len(scores)
	}
	if len(scores) > math.MaxInt32 {
		panic("online: TopN over more than 2^31−1 items")
	}
	if cap(dst) < n {
		dst = make([]int32, 0, n)
	}
	h := dst[:n]
	for i := range int32(n) {
		h[i] = i
	}
	// Heapify: the worst kept item goes to the root.
	for i := n/2 - 1; i >= 0; i-- {
		topnSiftDown(scores, h, i)
	}
	worst, wi := scores[h[0]], h[0]
	for i := int32(n); i < int32(len(scores)); i++ {
		s := scores[i]
		if s < worst {
			continue // fast path: both numbers, s strictly lower
		}
		if rankAbove(s, i, worst, wi) {
			h[0] = i
			topnSiftDown(scores, h, 0)
			worst, wi = scores[h[0]], h[0]
		}
	}
	// Heap sort: move the worst to the end repeatedly, leaving best first.
	for end := n - 1; end > 0; end-- {
		h[0], h[end] = h[end], h[0]
		topnSiftDown(scores, h[:end], 0)
	}
	return h
}

// topnSiftDown restores the min-heap property (each parent ranks below its
// children) for the subtree rooted at i.
func topnSiftDown(scores []float32, h []int32, i int) {
	n := len(h)
	for {
		c := 2*i + 1
		if c >= n {
			return
		}
		if c+1 < n && rankAbove(scores[h[c]], h[c], scores[h[c+1]], h[c+1]) {
			c++ // the right child ranks lower
		}
		if !rankAbove(scores[h[i]], h[i], scores[h[c]], h[c]) {
			return
		}
		h[i], h[c] = h[c], h[i]
		i = c
	}
}

// InTopN reports whether item target is among the n best items of scores in
// the ranking order of TopN (ties go to the lower index), which is the same
// as target appearing in TopN(scores, n, nil). It counts the items ranking
// above target, in blocks of 256, and stops after the block in which the
// count reaches n: O(len(scores)) at worst, no allocation. It reports false
// when target is out of range or n ≤ 0.
func InTopN(scores []float32, target int32, n int) bool {
	if n <= 0 || target < 0 || int(target) >= len(scores) {
		return false
	}
	st := scores[target]
	above := 0
	if st != st {
		// A NaN target: every number ranks above it, and NaNs of lower index.
		for i, s := range scores {
			if s == s || int32(i) < target {
				if above++; above >= n {
					return false
				}
			}
		}
		return true
	}
	// Items before target rank above it on a tie, items after it only when
	// strictly higher. Counting without a branch per item, and testing for
	// the early exit once per block, keeps the loop free of mispredictions.
	const block = 256
	for lo := 0; lo < len(scores); lo += block {
		hi := min(lo+block, len(scores))
		for i := lo; i < min(hi, int(target)); i++ {
			above += topnBool(scores[i] >= st)
		}
		for i := max(lo, int(target)+1); i < hi; i++ {
			above += topnBool(scores[i] > st)
		}
		if above >= n {
			return false
		}
	}
	return true
}

// topnBool returns 1 for true and 0 for false.
func topnBool(b bool) int {
	if b {
		return 1
	}
	return 0
}
