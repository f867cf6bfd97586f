//go:build !unix

package checkpoint

import (
	"errors"
	"os"
)

// lockDir is not implemented off Unix: freshet needs flock(2).
func lockDir(dir string) (*os.File, error) {
	return nil, errors.New("checkpoint: directory locking needs flock, which this platform lacks")
}
