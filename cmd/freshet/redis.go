package main

import (
	"context"
	"errors"
	"fmt"

	"go.uber.org/zap"

	"freshet.dev/freshet/config"
	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/checkpoint"
	"freshet.dev/freshet/sink/serving"
	"freshet.dev/freshet/sink/serving/reader"
)

// servingOptions maps the redis section onto the writer's options.
func servingOptions(cfg *config.Config, mode online.Mode, log *zap.Logger) (serving.Options, error) {
	r := cfg.Redis
	tc, err := tlsConfig(r.TLS)
	if err != nil {
		return serving.Options{}, asUsage(fmt.Errorf("redis.%w", err))
	}
	return serving.Options{
		Addrs:         r.Addrs,
		DB:            r.DB,
		Username:      r.Username,
		Password:      r.Password.Reveal(),
		TLS:           tc,
		Prefix:        r.Prefix,
		Mode:          mode,
		Scale:         [2]float64{cfg.Model.RatingMin, cfg.Model.RatingMax},
		FlushInterval: r.FlushInterval,
		FlushRows:     r.FlushRows,
		Grace:         r.Grace,
		WriteTimeout:  r.WriteTimeout,
		Logger:        log,
	}, nil
}

// restoreFromRedis rebuilds the model from the current serving version, for
// a daemon that starts without a local checkpoint (a new machine). It then
// writes that state as the first local snapshot, so the data directory is
// self-sufficient before any event is applied. It returns the restored meta
// and version, or nil and 0 when nothing is published.
func restoreFromRedis(ctx context.Context, o serving.Options, store *checkpoint.Store,
	m *online.Model, mon *online.Monitor, log *zap.Logger) (*online.Meta, uint64, error) {
	r, err := serving.OpenRestore(ctx, o)
	if errors.Is(err, reader.ErrNoVersion) {
		return nil, 0, nil
	}
	if err != nil {
		return nil, 0, fmt.Errorf("restore from redis: %w", err)
	}
	defer r.Close()
	meta := r.Meta
	if meta.Rank != m.Rank() || meta.Mode != m.Options().Mode.String() {
		return nil, 0, usagef("redis version %d holds a %s model of rank %d; the configuration asks for %s rank %d",
			r.Version, meta.Mode, meta.Rank, m.Options().Mode, m.Rank())
	}
	if err := r.Rows(ctx, m.ApplyRecord); err != nil {
		return nil, 0, fmt.Errorf("restore from redis version %d: %w", r.Version, err)
	}
	if err := m.Restore(meta.Model); err != nil {
		return nil, 0, fmt.Errorf("restore from redis version %d: %w", r.Version, err)
	}
	if len(meta.Monitor) > 0 {
		if err := mon.UnmarshalState(meta.Monitor); err != nil {
			return nil, 0, fmt.Errorf("restore monitor from redis: %w", err)
		}
	}
	if err := seedCheckpoint(store, m, meta); err != nil {
		return nil, 0, fmt.Errorf("write the restored model as the first snapshot: %w", err)
	}
	log.Info("restored from redis", zap.Uint64("version", r.Version), zap.Stringer("position", meta.Position),
		zap.Uint64("events", meta.Counts.Applied), zap.Int("users", m.Live(online.Users)), zap.Int("items", m.Live(online.Items)))
	return meta, r.Version, nil
}

// seedCheckpoint writes the whole model as a snapshot complete at meta,
// following the Checkpointer protocol (begin, rows, one append, commit).
func seedCheckpoint(store *checkpoint.Store, m *online.Model, meta *online.Meta) error {
	if err := store.BeginSnapshot(meta); err != nil {
		return err
	}
	var rs online.RowSet
	for _, side := range []online.Side{online.Users, online.Items} {
		for from := int32(0); from < m.Rows(side); from += online.DefaultSnapshotChunk {
			rs.Reset(m.Rank())
			m.CopyRows(side, from, min(from+online.DefaultSnapshotChunk, m.Rows(side)), &rs)
			if err := store.WriteRows(&rs); err != nil {
				return err
			}
		}
	}
	// The restored rows are in the snapshot; the log need not carry them.
	rs.Reset(m.Rank())
	m.TakeDirty(online.ConsumerLog, &rs)
	rs.Reset(m.Rank())
	if err := store.Append(&rs, meta); err != nil {
		return err
	}
	return store.Commit(meta)
}

// servingFields reports the writer's state in the trainer's progress line.
func servingFields(w *serving.Writer) func() []zap.Field {
	return func() []zap.Field {
		st := w.Status()
		f := []zap.Field{
			zap.Bool("redis_degraded", st.Degraded),
			zap.Int("redis_pending", st.Pending),
			zap.Uint64("redis_version", st.Version),
			zap.Uint64("redis_vectors", st.VectorsWritten),
		}
		if st.Degraded {
			f = append(f, zap.String("redis_error", st.LastError))
		}
		return f
	}
}
