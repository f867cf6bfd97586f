// Package sink writes what online produces: local checkpoints and the serving
// copy in Redis.
//
// The work is split into sub-packages:
//
//   - sink/checkpoint keeps durable local checkpoints: full snapshots plus an
//     incremental log, and recovers the newest exact state after a crash. It
//     implements online.Checkpointer.
//   - sink/serving keeps the serving copy of the factors in Redis and
//     implements online.Publisher.
//
// Data flows one way: stream -> online -> sink. Packages here import online
// (and stream for its plain types) but nothing imports them except cmd.
package sink
