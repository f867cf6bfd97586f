package main

import (
	"io"
	"os"

	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"
)

// newLogger builds the root logger: JSON lines in production, readable console
// output when format is "console", or "auto" and w is a terminal. The level
// is held in an AtomicLevel so it can change at run time.
func newLogger(w io.Writer, level, format string) (*zap.Logger, zap.AtomicLevel, error) {
	lvl := zap.NewAtomicLevel()
	if level != "" {
		if err := lvl.UnmarshalText([]byte(level)); err != nil {
			return nil, lvl, usagef("log level %q: %v", level, err)
		}
	}
	if format == "" || format == "auto" {
		format = "json"
		if f, ok := w.(*os.File); ok && isTerminal(f) {
			format = "console"
		}
	}
	ec := zap.NewProductionEncoderConfig()
	ec.TimeKey = "ts"
	ec.EncodeTime = zapcore.ISO8601TimeEncoder
	ec.EncodeDuration = zapcore.StringDurationEncoder
	var enc zapcore.Encoder
	switch format {
	case "json":
		enc = zapcore.NewJSONEncoder(ec)
	case "console":
		ec.EncodeLevel = zapcore.CapitalLevelEncoder
		enc = zapcore.NewConsoleEncoder(ec)
	default:
		return nil, lvl, usagef("log format %q: want auto, json or console", format)
	}
	core := zapcore.NewCore(enc, zapcore.Lock(zapcore.AddSync(w)), lvl)
	return zap.New(core), lvl, nil
}

// isTerminal reports whether f is a character device (a terminal).
func isTerminal(f *os.File) bool {
	fi, err := f.Stat()
	return err == nil && fi.Mode()&os.ModeCharDevice != 0
}
