//go:build !(goexperiment.simd && amd64)

package online

// fastKernelName names the fast kernels of this build.
const fastKernelName = "unrolled"

func dotFast(a, b []float32) float32 { return dotUnrolled(a, b) }

func updateFast(p, q []float32, a1, b1, a2, b2 float32) float32 {
	return updateUnrolled(p, q, a1, b1, a2, b2)
}

func dotBoundFast(a, b []float32) (float32, bool) { return dotBoundUnrolled(a, b) }

func updateFreeFast(p, q []float32, a1, b1, a2, b2 float32) {
	updateUnrolled(p, q, a1, b1, a2, b2)
}
