package main

import (
	"errors"
	"fmt"
)

// usageError marks a mistake in the command line or the configuration: the
// process exits 2, so supervisors can tell it from a runtime failure (1).
type usageError struct{ err error }

func (e *usageError) Error() string { return e.err.Error() }
func (e *usageError) Unwrap() error { return e.err }

func usagef(format string, args ...any) error {
	return &usageError{fmt.Errorf(format, args...)}
}

func asUsage(err error) error {
	if err == nil {
		return nil
	}
	return &usageError{err}
}

// errHelp is returned after -h: usage was printed, exit 0.
var errHelp = errors.New("help requested")

func exitCode(err error) int {
	var u *usageError
	switch {
	case err == nil, errors.Is(err, errHelp):
		return 0
	case errors.As(err, &u):
		return 2
	}
	return 1
}
