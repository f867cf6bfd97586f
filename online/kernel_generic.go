//go:build !(goexperiment.simd && amd64)

package online

// fastKernelName names the fast kernels of this build.
const fastKernelName = "unrolled"

// fastBounded reports whether this build's dotBoundFast reports small rows
// (so explicit steps on them skip the guard copies).
const fastBounded = false

func dotFast(a, b []float32) float32 { return dotUnrolled(a, b) }

func updateFast(p, q []float32, a1, b1, a2, b2 float32) float32 {
	return updateUnrolled(p, q, a1, b1, a2, b2)
}

// dotBoundFast reports no bound in the portable build: measured on the
// reference machine (testdata/bench/online-step.txt's machine, quiet, 5 runs),
// the bound's per-element magnitude test cost more than the row copies it
// saves (k = 64 in cache: 360 ns per step with it, 248 without, against 331
// for the plain loops), so this build always takes the guarded path.
func dotBoundFast(a, b []float32) (float32, bool) { return dotUnrolled(a, b), false }

func updateFreeFast(p, q []float32, a1, b1, a2, b2 float32) {
	updateUnrolled(p, q, a1, b1, a2, b2)
}
