package kafka

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"time"

	kgo "github.com/segmentio/kafka-go"
	"go.uber.org/zap"
)

// EnsureTopics creates the events topic and the dead-letter topic when they
// are missing (o.Partitions partitions, o.ReplicationFactor replicas) and
// waits until every partition of both has a leader. Call it before New: a
// group that joins before its topic exists can keep an empty assignment. An
// existing topic is left as it is.
func EnsureTopics(ctx context.Context, o Options) error {
	o, err := o.withDefaults()
	if err != nil {
		return err
	}
	tr := o.Security.transport()
	defer tr.CloseIdleConnections()
	client := &kgo.Client{Addr: kgo.TCP(o.Brokers...), Timeout: 10 * time.Second, Transport: tr}
	topics := []string{o.Topic, o.DeadLetterTopic}

	md, err := client.Metadata(ctx, &kgo.MetadataRequest{Topics: topics})
	if err != nil {
		return fmt.Errorf("kafka: metadata from %v: %w", o.Brokers, err)
	}
	var missing []kgo.TopicConfig
	for _, name := range topics {
		i := slices.IndexFunc(md.Topics, func(t kgo.Topic) bool { return t.Name == name })
		if i >= 0 && md.Topics[i].Error == nil && len(md.Topics[i].Partitions) > 0 {
			if n := len(md.Topics[i].Partitions); name == o.Topic && n != o.Partitions {
				o.Logger.Info("events topic exists with a different partition count; keeping it",
					zap.String("topic", name), zap.Int("partitions", n), zap.Int("configured", o.Partitions))
			}
			continue
		}
		missing = append(missing, kgo.TopicConfig{Topic: name, NumPartitions: o.Partitions, ReplicationFactor: o.ReplicationFactor})
	}
	if len(missing) > 0 {
		resp, err := client.CreateTopics(ctx, &kgo.CreateTopicsRequest{Topics: missing})
		if err != nil {
			return fmt.Errorf("kafka: creating topics: %w", err)
		}
		for _, t := range missing {
			if e := resp.Errors[t.Topic]; e != nil && !errors.Is(e, kgo.TopicAlreadyExists) {
				return fmt.Errorf("kafka: creating topic %q (%d partitions, replication %d): %w",
					t.Topic, t.NumPartitions, t.ReplicationFactor, e)
			}
			o.Logger.Info("created topic", zap.String("topic", t.Topic), zap.Int("partitions", t.NumPartitions))
		}
	}

	// Creation is asynchronous: wait for a leader on every partition.
	deadline := time.Now().Add(30 * time.Second)
	for {
		md, err := client.Metadata(ctx, &kgo.MetadataRequest{Topics: topics})
		if err == nil && allLed(md, topics) {
			return nil
		}
		if time.Now().After(deadline) {
			if err == nil {
				err = errors.New("some partitions have no leader")
			}
			return fmt.Errorf("kafka: topics %v not ready after 30s: %w", topics, err)
		}
		if !sleep(ctx, 100*time.Millisecond) {
			return ctx.Err()
		}
	}
}

func allLed(md *kgo.MetadataResponse, topics []string) bool {
	for _, name := range topics {
		i := slices.IndexFunc(md.Topics, func(t kgo.Topic) bool { return t.Name == name })
		if i < 0 || md.Topics[i].Error != nil || len(md.Topics[i].Partitions) == 0 {
			return false
		}
		for _, p := range md.Topics[i].Partitions {
			if p.Error != nil || p.Leader.Host == "" {
				return false
			}
		}
	}
	return true
}
