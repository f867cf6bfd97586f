package stream

import (
	"testing"

	"go.uber.org/goleak"
)

// TestMain fails the package's tests if any goroutine is left running, such
// as a file source's reader that Close did not stop.
func TestMain(m *testing.M) {
	goleak.VerifyTestMain(m)
}
