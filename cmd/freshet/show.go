package main

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/redis/go-redis/v9/maintnotifications"

	"freshet.dev/freshet/config"
	"freshet.dev/freshet/sink/serving/reader"
	"freshet.dev/freshet/stream"
	"freshet.dev/freshet/stream/kafka"
)

// runShow prints a user's vector from the current Redis version and the top-N
// items for that user over a candidate list, through the reader package that
// ranking services use.
func runShow(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("show", flag.ContinueOnError)
	fs.SetOutput(stderr)
	cfgPath := fs.String("config", "", "configuration `file`: the redis section names the server and prefix")
	user := fs.String("user", "", "user `ID` to show (required)")
	n := fs.Int("n", 10, "number of top items to print (0: all candidates)")
	cands := fs.String("candidates", "all", "candidate items: `all` (every item of the current version) or ID,ID,...")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *user == "" {
		return usagef("show: -user is required")
	}
	if *n < 0 {
		return usagef("show: -n %d: must be 0 or more", *n)
	}
	cfg, err := loadConfig(*cfgPath, "")
	if err != nil {
		return err
	}
	c, err := redisClient(cfg.Redis)
	if err != nil {
		return err
	}
	defer c.Close()
	r, err := reader.New(c, reader.Options{Prefix: cfg.Redis.Prefix})
	if err != nil {
		return asUsage(fmt.Errorf("redis.prefix: %w", err))
	}
	ctx, cancel := context.WithTimeout(ctx, time.Minute)
	defer cancel()

	res, err := r.Fetch(ctx, []string{*user}, nil)
	if err != nil {
		return fmt.Errorf("show: %w", err)
	}
	u := &res.Users[0]
	if !u.Found() {
		return fmt.Errorf("show: user %q: %w (version %d)", *user, reader.ErrUserNotFound, res.Meta.Version)
	}
	m := res.Meta
	fmt.Fprintf(stdout, "version %d (%s, rank %d, %d users, %d items, %d events applied)\n",
		m.Version, m.Mode, m.Rank, m.Users, m.Items, m.Applied)
	fmt.Fprintf(stdout, "user %s\n", strconv.Quote(*user))
	if m.HasBias() {
		fmt.Fprintf(stdout, "  bias     %s\n", f32(u.Bias))
		fmt.Fprintf(stdout, "  mean     %s\n", strconv.FormatFloat(m.GlobalMean, 'g', 8, 64))
	}
	fmt.Fprintf(stdout, "  updates  %d\n", u.Trailer.Count)
	var fb strings.Builder
	for j, x := range u.Factors {
		if j > 0 {
			fb.WriteByte(' ')
		}
		fb.WriteString(f32(x))
	}
	fmt.Fprintf(stdout, "  factors  [%s]\n", fb.String())

	var items []string
	if *cands == "all" {
		if items, err = allItems(ctx, c, r.Layout(), m); err != nil {
			return fmt.Errorf("show: list items of version %d: %w", m.Version, err)
		}
	} else {
		for _, id := range strings.Split(*cands, ",") {
			if id = strings.TrimSpace(id); id != "" {
				items = append(items, id)
			}
		}
		if len(items) == 0 {
			return usagef("show: -candidates %q names no item", *cands)
		}
	}
	rk, err := r.TopN(ctx, *user, items, *n)
	if err != nil {
		return fmt.Errorf("show: rank: %w", err)
	}
	what := "score"
	if m.Mode == "explicit" {
		what = "predicted rating μ+b_u+b_i+p·q"
	}
	fmt.Fprintf(stdout, "top %d of %d candidates (version %d, %s):\n", len(rk.Top), len(items), rk.Version, what)
	for i, s := range rk.Top {
		fmt.Fprintf(stdout, "  %3d  %-24s %s\n", i+1, strconv.Quote(s.Item), strconv.FormatFloat(s.Score, 'f', 4, 64))
	}
	if len(rk.Missing) > 0 {
		fmt.Fprintf(stdout, "not in the version: %d candidates (%s)\n", len(rk.Missing), quoteList(rk.Missing, 10))
	}
	return nil
}

// allItems lists every item ID of version m, one HKEYS per item bucket
// (single-key commands: fine on a cluster, and a CLI can afford the scan).
func allItems(ctx context.Context, c redis.UniversalClient, l reader.Layout, m *reader.Meta) ([]string, error) {
	var ids []string
	const per = 256
	for from := 0; from < m.Buckets; from += per {
		p := c.Pipeline()
		cmds := make([]*redis.StringSliceCmd, 0, per)
		for b := from; b < min(from+per, m.Buckets); b++ {
			cmds = append(cmds, p.HKeys(ctx, l.Bucket(m.Version, reader.SideItem, b)))
		}
		if _, err := p.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
			return nil, err
		}
		for _, cmd := range cmds {
			ids = append(ids, cmd.Val()...)
		}
	}
	slices.Sort(ids)
	return ids, nil
}

func quoteList(ids []string, max int) string {
	var q []string
	for i, id := range ids {
		if i == max {
			q = append(q, "...")
			break
		}
		q = append(q, strconv.Quote(id))
	}
	return strings.Join(q, ", ")
}

func f32(x float32) string { return strconv.FormatFloat(float64(x), 'g', 7, 32) }

// redisClient builds a client for the redis section (the CLI's own; the
// daemon's writer builds its own from the same section).
func redisClient(r config.Redis) (redis.UniversalClient, error) {
	if len(r.Addrs) == 0 {
		return nil, usagef("redis.addrs is empty (set redis.addrs or FRESHET_REDIS_ADDRS)")
	}
	tc, err := tlsConfig(r.TLS)
	if err != nil {
		return nil, asUsage(fmt.Errorf("redis.%w", err))
	}
	return redis.NewUniversalClient(&redis.UniversalOptions{
		Addrs:                 r.Addrs,
		DB:                    r.DB,
		Username:              r.Username,
		Password:              r.Password.Reveal(),
		TLSConfig:             tc,
		ContextTimeoutEnabled: true,
		DisableIdentity:       true,
		MaintNotificationsConfig: &maintnotifications.Config{
			Mode: maintnotifications.ModeDisabled,
		},
	}), nil
}

// runErase asks the daemon to erase a user or an item: it writes an erasure
// event to the Kafka topic, keyed like the ID's other events so that it is
// ordered after them, or appends it to a file the daemon follows.
func runErase(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("erase", flag.ContinueOnError)
	fs.SetOutput(stderr)
	cfgPath := fs.String("config", "", "configuration `file`: the kafka section names brokers and topic")
	user := fs.String("user", "", "user `ID` to erase")
	item := fs.String("item", "", "item `ID` to erase")
	file := fs.String("file", "", "append the erasure to this JSON-lines `file` (a file source) instead of the Kafka topic")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if (*user == "") == (*item == "") {
		return usagef("erase: give exactly one of -user and -item")
	}
	ev := stream.Event{Kind: stream.EraseUser, User: []byte(*user), Time: time.Now().UnixMilli()}
	key, what := ev.User, "user"
	if *item != "" {
		// An item's events come from many users: no key orders them all.
		// Keyed by the item, the erasure lands on one partition; events for
		// the item read after it from other partitions are refused by the
		// tombstone, events read before it are erased with the row.
		ev = stream.Event{Kind: stream.EraseItem, Item: []byte(*item), Time: ev.Time}
		key, what = ev.Item, "item"
	}
	line := stream.AppendJSON(nil, &ev)
	if bytes.IndexByte(line, '\n') >= 0 {
		return usagef("erase: the ID must not hold a newline")
	}
	if *file != "" {
		f, err := os.OpenFile(*file, os.O_WRONLY|os.O_APPEND, 0)
		if err != nil {
			return asUsage(fmt.Errorf("erase: -file: %w", err))
		}
		_, err = f.Write(append(line, '\n'))
		if cerr := f.Close(); err == nil {
			err = cerr
		}
		if err != nil {
			return fmt.Errorf("erase: append to %s: %w", *file, err)
		}
		fmt.Fprintf(stdout, "appended an erase_%s event to %s\n", what, *file)
		return nil
	}
	cfg, err := loadConfig(*cfgPath, "")
	if err != nil {
		return err
	}
	if len(cfg.Kafka.Brokers) == 0 || cfg.Kafka.Topic == "" {
		return usagef("erase: kafka.brokers and kafka.topic must be set (or give -file)")
	}
	sec, err := kafkaSecurity(cfg.Kafka)
	if err != nil {
		return err
	}
	ctx, cancel := context.WithTimeout(ctx, 30*time.Second)
	defer cancel()
	rec := kafka.Record{Key: key, Value: line}
	st, err := kafka.Produce(ctx, kafka.ProduceOptions{Brokers: cfg.Kafka.Brokers, Topic: cfg.Kafka.Topic, Security: sec, Max: 1},
		func(yield func(kafka.Record) bool) { yield(rec) })
	if err != nil {
		return fmt.Errorf("erase: write to topic %s: %w", cfg.Kafka.Topic, err)
	}
	if st.Records != 1 {
		return fmt.Errorf("erase: the broker did not acknowledge the erasure (topic %s)", cfg.Kafka.Topic)
	}
	fmt.Fprintf(stdout, "wrote an erase_%s event to topic %s\n", what, cfg.Kafka.Topic)
	return nil
}
