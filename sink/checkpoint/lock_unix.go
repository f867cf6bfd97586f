//go:build unix

package checkpoint

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
)

// lockDir takes flock(LOCK_EX|LOCK_NB) on dir/LOCK and writes this process's
// PID into it. The lock lives as long as the returned file stays open.
func lockDir(dir string) (*os.File, error) {
	path := filepath.Join(dir, lockName)
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o640)
	if err != nil {
		return nil, fmt.Errorf("checkpoint: open lock file: %w", err)
	}
	for {
		err = syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB)
		if !errors.Is(err, syscall.EINTR) {
			break
		}
	}
	if err != nil {
		holder := "unknown"
		if b, rerr := os.ReadFile(path); rerr == nil {
			if pid, perr := strconv.Atoi(strings.TrimSpace(string(b))); perr == nil {
				holder = strconv.Itoa(pid)
			}
		}
		f.Close()
		if errors.Is(err, syscall.EWOULDBLOCK) {
			return nil, fmt.Errorf("%w: %s is held by process %s", ErrLocked, dir, holder)
		}
		return nil, fmt.Errorf("checkpoint: lock %s: %w", dir, err)
	}
	pid := strconv.Itoa(os.Getpid()) + "\n"
	if err := f.Truncate(0); err == nil {
		_, err = f.WriteAt([]byte(pid), 0)
	}
	if err != nil {
		f.Close()
		return nil, fmt.Errorf("checkpoint: write lock file: %w", err)
	}
	return f, nil
}
