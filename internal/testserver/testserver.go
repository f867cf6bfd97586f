// Package testserver finds the real servers the integration tests run
// against, with one policy for every package: a test skips when its
// server's variable is unset (a plain go test ./... on a laptop), and fails
// when the variable is set but nothing answers there (CI sets them all, so
// a server that did not start fails the run instead of hiding).
package testserver

import (
	"context"
	"net"
	"os"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
)

// Kafka returns the broker address held in the variable env (see
// deploy/kafka.sh env).
func Kafka(tb testing.TB, env string) string {
	tb.Helper()
	addr := os.Getenv(env)
	if addr == "" {
		tb.Skipf("%s is unset: start the test broker with deploy/kafka.sh start and export $(deploy/kafka.sh env)", env)
	}
	c, err := net.DialTimeout("tcp", addr, 5*time.Second)
	if err != nil {
		tb.Fatalf("%s=%s is set but the broker does not answer: %v", env, addr, err)
	}
	c.Close()
	return addr
}

// RedisEnv names the variable that holds the test Redis address.
const RedisEnv = "FRESHET_TEST_REDIS"

// Redis returns the Redis address held in RedisEnv (see deploy/redis.sh env),
// after a PING.
func Redis(tb testing.TB) string {
	tb.Helper()
	addr := os.Getenv(RedisEnv)
	if addr == "" {
		tb.Skipf("%s is unset: start Redis with deploy/redis.sh start and export $(deploy/redis.sh env)", RedisEnv)
	}
	c := redis.NewClient(&redis.Options{Addr: addr, DialTimeout: 2 * time.Second})
	defer c.Close()
	if err := c.Ping(context.Background()).Err(); err != nil {
		tb.Fatalf("%s=%s is set but unreachable: %v", RedisEnv, addr, err)
	}
	return addr
}
