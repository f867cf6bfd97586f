// Command freshet keeps user and item latent-factor vectors fresh from a live
// stream of interactions.
//
// Usage:
//
//	freshet run      [-config FILE] [-data DIR] [-check]   run the daemon (default: the built-in demo)
//	freshet replay   -file FILE [-curve OUT.csv]            evaluate a file offline, test-then-train
//	freshet generate [-events N] [-o FILE]                  write the demo scenario as JSON lines
//	freshet feed     [-rate R] [-events N] [-file F]        send the demo (or a file) to the Kafka topic
//	freshet show     -user ID [-n N]                        a user's vector and top-N items from Redis
//	freshet erase    -user ID | -item ID                    send a privacy erasure event
//
// The daemon serves /healthz, /readyz, /status and /metrics when http.listen
// is set. Configuration: a YAML file, FRESHET_<SECTION>_<KEY> environment
// overrides, then flags; see deploy/freshet.example.yaml.
//
// Exit codes: 0 after a clean stop, 2 for bad usage or configuration, 1 for a
// runtime failure.
package main

import (
	"context"
	"fmt"
	"os"
)

func main() {
	if err := run(context.Background(), os.Args[1:], os.Stdout, os.Stderr); err != nil {
		fmt.Fprintf(os.Stderr, "freshet: %v\n", err)
		os.Exit(exitCode(err))
	}
}
