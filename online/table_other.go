//go:build !linux

package online

import "unsafe"

// mappings is empty off Linux: chunks come from make.
type mappings struct{}

var useMmap = false

func (ms *mappings) alloc(size uintptr) unsafe.Pointer { return nil }

func attachMappings(m *Model) {}
