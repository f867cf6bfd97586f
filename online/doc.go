// Package online holds freshet's model and its math: latent-factor tables for
// users and items, SGD steps for explicit ratings (biased matrix factorization)
// and implicit positive-only feedback, prequential (test-then-train) error, drift
// detection, and the Trainer that owns the tables and drives them from a
// stream.Source.
//
// # Threading
//
// One trainer goroutine owns the tables. Sources hand it bounded batches. The
// checkpoint writer and the serving publisher receive copies of rows taken at
// batch boundaries (RowSet), never shared access.
//
// # Downstream
//
// online declares what it needs from downstream as small interfaces,
// Checkpointer and Publisher; package sink implements them and cmd connects
// them. online never imports sink or config.
package online
