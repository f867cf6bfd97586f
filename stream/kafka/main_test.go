package kafka

import (
	"testing"

	"go.uber.org/goleak"
)

// TestMain checks that no test leaves a goroutine behind: Close must stop the
// workers, the group, the dead-letter writer and their connections.
func TestMain(m *testing.M) {
	goleak.VerifyTestMain(m)
}
