//go:build !linux

package online

// mappings is empty off Linux: chunks come from make.
type mappings struct{}

var useMmap = false

func (ms *mappings) floats(n int) []float32 { return nil }

func attachMappings(m *Model) {}
