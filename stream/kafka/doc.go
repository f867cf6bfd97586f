// Package kafka reads freshet's interaction events from an Apache Kafka topic
// and sets bad records aside on a dead-letter topic.
//
// # Delivery
//
// A Source is a member of a consumer group built on kafka-go's ConsumerGroup
// and Generation API. For each generation it starts one worker per assigned
// partition. A worker reads its partition from a chosen offset (DialLeader,
// Seek, ReadBatchWith), decodes each record and pushes batches into a bounded
// queue that the trainer drains with Next, so consuming and training overlap.
// A worker starts at, in order of preference: the position handed to New (the
// restored checkpoint) or the trainer's latest delivered position, when this
// source has held the partition without a break; the group's committed offset;
// the configured start for a brand-new model.
//
// Commit stores, for each partition the current generation assigned to this
// member, the next offset recorded in the position (last applied + 1), through
// that generation only. A commit never moves a partition backwards and never
// passes a dead-lettered record whose write the dead-letter topic has not yet
// acknowledged. A commit that fails is taken as lost ownership: it is counted
// and logged, and the trainer goes on.
//
// Delivery is at-least-once. After a crash the source reopens at the
// checkpoint's position and re-reads what came after it; after a rebalance a
// partition's new owner starts from the committed offset. Both re-deliver a
// bounded number of records (at most the records since the last commit). SGD
// tolerates them: a repeated event is one more small step along the same
// gradient, the same as a user repeating an action.
//
// # Rebalances
//
// When a generation ends its workers stop. Batches that were already handed
// to the trainer are applied. Batches still queued when the next generation's
// start offsets are chosen are discarded, and the start offsets come from what
// was handed over, so a partition kept by this source is read again from the
// first record the trainer has not seen: nothing is skipped.
//
// # One source per model
//
// Until freshet scales out, a model has exactly one source. Unless
// Options.Shared is set, New refuses to join a group that already has active
// members (a second daemon for the same model), after waiting one session
// timeout for members left behind by a crashed process to expire. The check is
// racy (two sources that start within the same instant can both pass it);
// the daemon's data-directory lock covers the same machine.
package kafka
