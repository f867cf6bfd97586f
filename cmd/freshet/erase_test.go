package main

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"freshet.dev/freshet/online"
)

// TestEraseEndToEnd follows a file with the daemon (Redis on), erases one
// listener with the erase subcommand (which appends the erasure to the file)
// and then feeds more events, some of them for that listener. Afterwards the
// ID is absent
//
//   - from the model: Lookup misses, Intern returns ErrErased;
//   - from every version in Redis: no hash under the prefix has the field,
//     no string value (pointer, metadata) holds the bytes;
//   - from every file in the data directory (snapshots, logs, rejects), as
//     raw bytes; a bad record mentioning the listener was set aside before
//     the erasure and is gone from the rejects file, while another user's
//     bad record stays.
//
// Then a replay from the start. What it can promise: the erasure event is
// part of the input, so a replay into an empty data directory (Redis restore
// off) learns the listener's early events again, reaches the erasure, erases
// it again (with the same purge of snapshots, logs and rejects) and refuses
// the later events; the end state is the same as the first run's. A daemon
// that restores from Redis instead resumes after the erasure with the
// tombstone from the version's metadata and refuses the ID from the start.
// What it cannot promise: the source itself still holds the listener's
// events (the file, or a Kafka topic until its retention drops them) and is
// outside freshet's data; a replay of a source cut before the erasure event
// would learn the listener again, since the tombstone lives in freshet's
// checkpoint and Redis copy, not in the input.
func TestEraseEndToEnd(t *testing.T) {
	addr := testRedis(t)
	prefix := redisPrefix(t, addr)
	const victim = "listener-gone-7734"
	file := filepath.Join(t.TempDir(), "events.jsonl")
	rng := rand.New(rand.NewPCG(5, 6))
	ts := int64(1_767_000_000_000)
	var buf bytes.Buffer
	good := 0
	ev := func(user string) {
		ts += 1000
		fmt.Fprintf(&buf, `{"user":%q,"item":"show-%03d","value":%d,"time":%d}`+"\n", user, rng.IntN(50), 1+rng.IntN(5), ts)
		good++
	}
	phase := func(n int, victimEvery int) (victimN int) {
		for i := range n {
			if i%victimEvery == 0 {
				ev(victim)
				victimN++
			} else {
				ev(fmt.Sprintf("listener-%04d", rng.IntN(200)))
			}
		}
		return victimN
	}
	phase(3000, 25)
	// Two bad records (rating above the scale): the victim's and another's.
	fmt.Fprintf(&buf, `{"user":%q,"item":"show-001","value":9,"time":%d}`+"\n", victim, ts)
	fmt.Fprintf(&buf, `{"user":"listener-0001","item":"show-002","value":9,"time":%d}`+"\n", ts)
	phase(1000, 25)
	first := good
	if err := os.WriteFile(file, buf.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}

	env := withRedis(map[string]string{
		"FRESHET_SOURCE_KIND":               "file",
		"FRESHET_SOURCE_FILE_PATH":          file,
		"FRESHET_SOURCE_FILE_FOLLOW":        "true",
		"FRESHET_MODEL_RANK":                "8",
		"FRESHET_MONITOR_PROGRESS_INTERVAL": "100ms",
		"FRESHET_CHECKPOINT_FLUSH_INTERVAL": "50ms",
	}, addr, prefix)
	dir := t.TempDir()
	p := start(t, env, "run", "-data", dir)
	eventsAt := func(n int) func(logLine) bool {
		return func(l logLine) bool { return l.msg() == "progress" && l.uint(t, "events") == uint64(n) }
	}
	_, i := p.mustLine(0, procTimeout, "progress at the first part's end", eventsAt(first))
	// Preconditions: the victim is served and its bad record was set aside.
	p.mustLine(0, procTimeout, "version published", msgIs("serving: version published"))
	time.Sleep(500 * time.Millisecond) // > the 200 ms flush interval
	if n := fieldCount(t, addr, prefix, victim); n == 0 {
		t.Fatal("precondition: the victim is in no Redis hash before the erasure")
	}
	if b, _ := os.ReadFile(filepath.Join(dir, "rejects.jsonl")); !bytes.Contains(b, []byte(victim)) {
		t.Fatalf("precondition: the rejects file does not hold the victim's bad record:\n%s", b)
	}

	out := runCLI(t, nil, "erase", "-user", victim, "-file", file)
	if !strings.Contains(out, "erase_user") {
		t.Fatalf("erase output: %q", out)
	}
	_, i = p.mustLine(i, procTimeout, "erased", msgIs("erased"))

	// More events, the victim's among them: refused by the tombstone.
	buf.Reset()
	good = 0
	refused := phase(2000, 10)
	f, err := os.OpenFile(file, os.O_WRONLY|os.O_APPEND, 0)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := f.Write(buf.Bytes()); err != nil {
		t.Fatal(err)
	}
	f.Close()
	total := first + good - refused
	pl, _ := p.mustLine(i, procTimeout, "progress at the end", eventsAt(total))
	if got := pl.uint(t, "refused"); got != uint64(refused) {
		t.Fatalf("refused %d events, want the victim's %d after the erasure", got, refused)
	}
	p.mustLine(i, procTimeout, "erasure snapshot", msgIs("snapshot written"))
	time.Sleep(300 * time.Millisecond)
	p.signal(syscall.SIGTERM)
	if code, sig := p.wait(procTimeout); code != 0 || sig {
		t.Fatalf("exit code %d (signaled %v), want 0; log:\n%s", code, sig, p.dump())
	}
	if strings.Contains(p.stderrText(), victim) {
		t.Fatal("the daemon's log holds the erased ID")
	}

	d := recoverDir(t, dir, env)
	assertErased(t, d, victim)
	versions := assertNotInRedis(t, addr, prefix, victim)
	assertNotInDir(t, dir, victim)
	if b, _ := os.ReadFile(filepath.Join(dir, "rejects.jsonl")); !bytes.Contains(b, []byte("listener-0001")) {
		t.Fatalf("the other user's bad record is gone from the rejects file too:\n%s", b)
	}
	sameAsModel(t, readServed(t, addr, prefix), d)
	if u := d.model.Live(online.Users); u != 200 {
		t.Fatalf("%d live users after the erasure, want 200", u)
	}

	// Replay from the start into an empty directory, Redis off: the
	// erasure is re-applied from the input.
	replayEnv := withRedis(env, addr, prefix)
	replayEnv["FRESHET_REDIS_ENABLED"] = "false"
	replayEnv["FRESHET_SOURCE_FILE_FOLLOW"] = "false"
	rdir := t.TempDir()
	rp, _, rstop := runToEnd(t, rdir, replayEnv)
	rp.mustLine(0, 0, "erased", msgIs("erased"))
	if got := rstop.uint(t, "events"); got != uint64(total) {
		t.Fatalf("replay applied %d events, want %d", got, total)
	}
	rd := recoverDir(t, rdir, replayEnv)
	assertErased(t, rd, victim)
	assertNotInDir(t, rdir, victim)
	sameModels(t, rd, d)

	// An empty directory restoring from Redis: resumes after the erasure,
	// the tombstone comes with the version's metadata.
	restEnv := withRedis(env, addr, prefix)
	restEnv["FRESHET_SOURCE_FILE_FOLLOW"] = "false"
	sdir := t.TempDir()
	sp, _, sstop := runToEnd(t, sdir, restEnv)
	sp.mustLine(0, 0, "restored", msgIs("restored from redis"))
	if got := sstop.uint(t, "events"); got != uint64(total) {
		t.Fatalf("restored run ends at %d events, want %d", got, total)
	}
	sd := recoverDir(t, sdir, restEnv)
	assertErased(t, sd, victim)
	assertNotInDir(t, sdir, victim)
	assertNotInRedis(t, addr, prefix, victim)
	sameModels(t, sd, d)
	t.Logf("%d events, %d refused after the erasure; %d Redis versions checked", total, refused, versions)
}

// assertErased requires the recovered model to refuse id for good.
func assertErased(t *testing.T, d durable, id string) {
	t.Helper()
	if row, ok := d.model.Lookup(online.Users, []byte(id)); ok {
		t.Fatalf("the recovered model still finds %q at row %d", id, row)
	}
	if _, _, err := d.model.Intern(online.Users, []byte(id), 0); !errors.Is(err, online.ErrErased) {
		t.Fatalf("Intern(%q) after recovery: %v, want ErrErased", id, err)
	}
	for s := online.Users; s <= online.Items; s++ {
		for _, rec := range d.rows[s].Recs {
			if bytes.Contains(rec.ID, []byte(id)) {
				t.Fatalf("a %s row still carries the ID: %+v", s, rec)
			}
		}
	}
}

// fieldCount counts the hashes under prefix that have field id.
func fieldCount(t *testing.T, addr, prefix, id string) int {
	t.Helper()
	c := redis.NewClient(&redis.Options{Addr: addr})
	defer c.Close()
	ctx := context.Background()
	n := 0
	for _, k := range scanKeys(t, c, prefix) {
		if c.Type(ctx, k).Val() == "hash" && c.HExists(ctx, k, id).Val() {
			n++
		}
	}
	return n
}

// assertNotInRedis checks every key under prefix, of every version: no
// hash has the field, no string holds the bytes. It returns the number of
// versions seen (distinct meta keys).
func assertNotInRedis(t *testing.T, addr, prefix, id string) int {
	t.Helper()
	c := redis.NewClient(&redis.Options{Addr: addr})
	defer c.Close()
	ctx := context.Background()
	keys := scanKeys(t, c, prefix)
	if len(keys) == 0 {
		t.Fatalf("no keys under %s", prefix)
	}
	versions, hashes := 0, 0
	for _, k := range keys {
		switch typ := c.Type(ctx, k).Val(); typ {
		case "hash":
			hashes++
			ok, err := c.HExists(ctx, k, id).Result()
			if err != nil {
				t.Fatal(err)
			}
			if ok {
				t.Fatalf("hash %s still has the erased ID", k)
			}
		case "string":
			v, err := c.Get(ctx, k).Result()
			if err != nil && !errors.Is(err, redis.Nil) {
				t.Fatal(err)
			}
			if strings.Contains(v, id) {
				t.Fatalf("%s holds the erased ID", k)
			}
			if strings.HasSuffix(k, "/meta") {
				versions++
			}
		case "none": // expired meanwhile
		default:
			t.Fatalf("unexpected %s key %s", typ, k)
		}
	}
	if versions == 0 || hashes == 0 {
		t.Fatalf("%d versions and %d hashes under %s: nothing was checked", versions, hashes, prefix)
	}
	return versions
}

// assertNotInDir greps every file in dir for the raw ID bytes.
func assertNotInDir(t *testing.T, dir, id string) {
	t.Helper()
	entries, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	snaps := 0
	for _, e := range entries {
		if e.IsDir() {
			continue
		}
		b, err := os.ReadFile(filepath.Join(dir, e.Name()))
		if err != nil {
			t.Fatal(err)
		}
		if bytes.Contains(b, []byte(id)) {
			t.Fatalf("%s in the data directory holds the erased ID", e.Name())
		}
		if strings.HasPrefix(e.Name(), "snap-") {
			snaps++
			// The grep is meaningful: snapshots hold the other IDs as raw bytes.
			if !bytes.Contains(b, []byte("listener-0")) {
				t.Fatalf("%s holds no listener ID at all", e.Name())
			}
		}
	}
	if snaps == 0 {
		t.Fatalf("no snapshot in %s", dir)
	}
}
