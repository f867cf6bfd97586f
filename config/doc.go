// Package config loads, checks and prints freshet's configuration.
//
// # Loading
//
// Load (or Parse, for text in memory) builds the effective configuration in
// four steps:
//
//  1. Default(): the values below, which run the built-in demo (scenario
//     source, explicit mode, data in ./data, no Kafka, no Redis).
//  2. The YAML file, decoded strictly: an unknown key, a duplicate key or a
//     value of the wrong type is an error naming the file, line and key path
//     (config: freshet.yaml:22: unknown key "redis.adress" (did you mean
//     "addrs"?)). Keys absent from the file keep their defaults; a section
//     written with no keys keeps its defaults too. An empty file, or an empty
//     path given to Load, means all defaults. Integers refuse fractions,
//     booleans are true or false, and durations are Go duration strings
//     ("500ms", "5s", "10m").
//  3. Environment overrides (ApplyEnv): every key has a variable named
//     FRESHET_ followed by its path upper-cased with dots as underscores, for
//     example FRESHET_MODEL_LEARN_RATE=0.02, FRESHET_KAFKA_BROKERS=k1:9092,k2:9092
//     (lists are comma-separated) and FRESHET_REDIS_ENABLED=true.
//  4. Validate, which reports every problem at once, each naming the place it
//     was set, the key path and the bad value:
//     config: freshet.yaml:14: model.learn_rate must be in (0, 1], got 2.5
//
// Relative paths (data_dir, source.file.path, TLS and password files) are
// relative to the working directory, not to the configuration file.
//
// The data directory is a process-level setting: the command's -data flag,
// when given, overrides data_dir (flag over environment over file over
// default).
//
// # Secrets
//
// Passwords are never written in the file: kafka.sasl and redis take a
// password_file (read whole, one trailing newline dropped) or a password_env
// (the name of a variable that holds it). ResolveSecrets reads them into
// Secret values, whose every printed or encoded form is "[redacted]". Dump
// (and String, so %v) prints the effective configuration with the file and
// variable names only. An inline "password" key is refused.
//
// # Keys
//
// Every key with its default (the list is checked against Default by a test):
//
//	key                                  default          meaning
//	data_dir                             ./data           checkpoints, snapshots, rejects file
//	model.mode                           explicit         explicit (ratings) or implicit (positive-only)
//	model.rank                           32               latent factors k, 1..1024
//	model.learn_rate                     0.01             SGD step for factors, (0, 1]
//	model.bias_learn_rate                0.01             SGD step for biases, [0, 1]
//	model.reg                            0.02             L2 penalty on factors, [0, 1]
//	model.bias_reg                       0.02             L2 penalty on biases, [0, 1]
//	model.rating_min                     1                lowest rating (explicit)
//	model.rating_max                     5                highest rating, above rating_min
//	model.init_std                       0.1              std of new rows' Gaussian init, (0, 1]
//	model.decay                          0                per-row step decay, [0, 1]; 0 = off
//	model.decay_floor                    0.1              smallest decayed step / learn_rate, (0, 1]
//	model.error_clip                     0                clip |error| per step; 0 = off
//	model.negatives                      3                sampled negatives per positive (implicit), 0..100
//	model.pairwise                       false            BPR pairwise step (implicit; negatives >= 1)
//	model.max_users                      0                user row cap; 0 = none
//	model.max_items                      0                item row cap; 0 = none
//	model.seed                           1                seed for init and sampling
//	monitor.fading                       0.999            fading factor alpha, (0, 1)
//	monitor.window                       10000            sliding prequential window, events
//	monitor.page_hinkley.delta           0.005            Page-Hinkley tolerated change
//	monitor.page_hinkley.lambda          50               Page-Hinkley alarm threshold, > 0
//	monitor.page_hinkley.min_samples     30               samples before an alarm may fire
//	monitor.adwin.enabled                true             run ADWIN beside Page-Hinkley
//	monitor.adwin.delta                  0.002            ADWIN confidence, (0, 1)
//	monitor.recall_top_n                 10               N of prequential recall@N
//	monitor.recall_rate                  50               recall evaluations per second cap; 0 = off
//	monitor.progress_interval            5s               progress log period; 0 = off
//	source.kind                          scenario         scenario, file or kafka
//	source.batch_size                    256              events per batch, 1..100000
//	source.scenario.seed                 1                demo generator seed
//	source.scenario.listeners            20000            demo users
//	source.scenario.shows                2000             demo items
//	source.scenario.communities          8                taste communities
//	source.scenario.rank                 8                planted model rank
//	source.scenario.noise                0.3              rating noise sigma
//	source.scenario.events               0                events to generate; 0 = endless
//	source.scenario.shift_at             1000000          event index of a taste shift; 0 = none
//	source.scenario.rate                 20000            events per second; 0 = unpaced
//	source.file.path                     ""               file to replay (required for kind file)
//	source.file.format                   auto             jsonl, csv, tsv or auto
//	source.file.follow                   false            keep reading as the file grows
//	kafka.brokers                        []               bootstrap host:port list (required for kind kafka)
//	kafka.topic                          ""               topic to consume (required for kind kafka)
//	kafka.group                          freshet          consumer group
//	kafka.dead_letter_topic              ""               topic for rejected records; "" = TOPIC.rejects
//	kafka.start                          earliest         earliest or latest, for a new model and group
//	kafka.min_bytes                      1                fetch minimum bytes
//	kafka.max_bytes                      10485760         fetch maximum bytes
//	kafka.max_wait                       500ms            fetch wait, 250ms..1s
//	kafka.session_timeout                10s              group session timeout, 1s..30m
//	kafka.create_topics                  false            create missing topics
//	kafka.partitions                     1                partitions of created topics
//	kafka.replication                    1                replication factor of created topics
//	kafka.tls.enabled                    false            TLS to the brokers
//	kafka.tls.ca_file                    ""               PEM roots; "" = system roots
//	kafka.tls.cert_file                  ""               client certificate (with key_file)
//	kafka.tls.key_file                   ""               client key (with cert_file)
//	kafka.tls.server_name                ""               name to verify; "" = from the address
//	kafka.tls.insecure_skip_verify       false            skip certificate checks (tests only)
//	kafka.sasl.mechanism                 ""               "", plain, scram-sha-256 or scram-sha-512
//	kafka.sasl.username                  ""               SASL user
//	kafka.sasl.password_file             ""               file holding the SASL password
//	kafka.sasl.password_env              ""               variable holding the SASL password
//	checkpoint.flush_interval            1s               longest time between flushes
//	checkpoint.flush_rows                50000            flush once this many rows are dirty
//	checkpoint.snapshot_interval         5m               full snapshot period
//	checkpoint.keep_snapshots            1                full snapshots kept, 1..1000
//	redis.enabled                        false            publish factors to Redis
//	redis.addrs                          [127.0.0.1:6379] host:port list; several = cluster
//	redis.db                             0                database (0 for a cluster)
//	redis.username                       ""               ACL user; "" = default user
//	redis.password_file                  ""               file holding the password
//	redis.password_env                   ""               variable holding the password
//	redis.tls.enabled                    false            TLS to Redis
//	redis.tls.ca_file                    ""               PEM roots; "" = system roots
//	redis.tls.cert_file                  ""               client certificate (with key_file)
//	redis.tls.key_file                   ""               client key (with cert_file)
//	redis.tls.server_name                ""               name to verify; "" = from the address
//	redis.tls.insecure_skip_verify       false            skip certificate checks (tests only)
//	redis.prefix                         freshet          prefix of every key written
//	redis.flush_interval                 1s               longest time between publishes
//	redis.flush_rows                     50000            publish once this many rows are dirty
//	redis.grace                          10m              old version kept readable this long
//	redis.write_timeout                  5s               timeout of one write
//	log.level                            info             debug, info, warn or error
//	log.format                           auto             auto, json or console
//	http.listen                          ""               metrics/health host:port; "" = off
//
// # Sections in use
//
// The kafka section matters when source.kind is kafka (the dead-letter topic
// too); redis when redis.enabled is true. Keys of unused sections are still
// range-checked, but their required keys are not demanded.
package config
