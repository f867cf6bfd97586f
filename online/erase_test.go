package online_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"go.uber.org/zap/zaptest"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/checkpoint"
	"freshet.dev/freshet/stream"
)

// TestTrainerEraseCheckpoint runs the trainer over a file with a real
// checkpoint store. Periodic snapshots and frequent cuts put the victim's
// rows into several snapshots and logs before an erase_user event in the
// middle of the stream; events for the victim follow it. After Run:
//
//   - no file in the data directory holds the victim's ID bytes (the erasure
//     snapshot was committed and everything older purged; the log after it
//     names the erased row only by its tombstone digest);
//   - the later events for the victim were refused, not re-learned;
//   - recovery gives a model where Lookup misses and Intern returns
//     ErrErased for the ID, while the other users are intact.
func TestTrainerEraseCheckpoint(t *testing.T) {
	const victim = "listener-erase-me-0042"
	dir := t.TempDir()
	data := filepath.Join(t.TempDir(), "events.jsonl")

	rng := rand.New(rand.NewPCG(11, 12))
	var buf bytes.Buffer
	const before, after = 30000, 10000
	ts := int64(1_700_000_000_000)
	line := func(user string) {
		ts += 10
		fmt.Fprintf(&buf, `{"user":%q,"item":"show-%03d","value":%d,"time":%d}`+"\n",
			user, rng.IntN(80), 1+rng.IntN(5), ts)
	}
	other := func() string { return fmt.Sprintf("listener-%04d", rng.IntN(300)) }
	victimBefore, victimAfter := 0, 0
	for i := range before {
		if i%20 == 0 {
			line(victim)
			victimBefore++
		} else {
			line(other())
		}
	}
	fmt.Fprintf(&buf, `{"user":%q,"kind":"erase_user","time":%d}`+"\n", victim, ts)
	for i := range after {
		if i%20 == 0 {
			line(victim)
			victimAfter++
		} else {
			line(other())
		}
	}
	if err := os.WriteFile(data, buf.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}

	src, err := stream.OpenFile(stream.FileOptions{Path: data, BatchSize: 256,
		Decode: stream.DecodeOptions{MinValue: 1, MaxValue: 5}}, stream.Position{})
	if err != nil {
		t.Fatal(err)
	}
	defer src.Close()
	store, err := checkpoint.Open(checkpoint.Options{Dir: dir, Keep: 3})
	if err != nil {
		t.Fatal(err)
	}
	m, mon := newPair(t, 8)
	var snaps int
	tr, err := online.NewTrainer(online.TrainerOptions{
		Model: m, Monitor: mon, Source: src, Checkpoint: store,
		FlushInterval: time.Millisecond, SnapshotInterval: time.Millisecond, SnapshotChunk: 64,
		Progress: -1, Logger: zaptest.NewLogger(t),
		OnSnapshot: func(online.SnapshotStats) { snaps++ },
	})
	if err != nil {
		t.Fatal(err)
	}
	if err := tr.Run(context.Background()); err != nil {
		t.Fatal(err)
	}
	if err := store.Close(); err != nil {
		t.Fatal(err)
	}
	c := tr.Counts()
	if c.Erased != 1 {
		t.Fatalf("erased %d, want 1", c.Erased)
	}
	if c.Refused != uint64(victimAfter) {
		t.Fatalf("refused %d events, want the %d for the victim after its erasure", c.Refused, victimAfter)
	}
	if want := uint64(before + after - victimAfter); c.Applied != want {
		t.Fatalf("applied %d, want %d", c.Applied, want)
	}
	if _, ok := m.Lookup(online.Users, []byte(victim)); ok {
		t.Fatal("the live model still finds the victim")
	}

	files, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	for _, f := range files {
		if f.IsDir() {
			continue
		}
		b, err := os.ReadFile(filepath.Join(dir, f.Name()))
		if err != nil {
			t.Fatal(err)
		}
		if bytes.Contains(b, []byte(victim)) {
			t.Errorf("%s holds the erased ID", f.Name())
		}
		if strings.HasPrefix(f.Name(), "snap-") && !bytes.Contains(b, []byte("listener-0")) {
			// A sanity check that the grep can find IDs at all: a
			// snapshot holds the other users' IDs as raw bytes.
			t.Errorf("%s (%d bytes) holds no user ID at all: is the grep meaningful?", f.Name(), len(b))
		}
	}

	store2, err := checkpoint.Open(checkpoint.Options{Dir: dir})
	if err != nil {
		t.Fatal(err)
	}
	defer store2.Close()
	m2, _ := newPair(t, 8)
	meta, _, err := store2.Recover(m2.ApplyRecord)
	if err != nil {
		t.Fatal(err)
	}
	if err := m2.Restore(meta.Model); err != nil {
		t.Fatal(err)
	}
	if _, ok := m2.Lookup(online.Users, []byte(victim)); ok {
		t.Fatal("the recovered model finds the victim")
	}
	if _, _, err := m2.Intern(online.Users, []byte(victim), ts); !errors.Is(err, online.ErrErased) {
		t.Fatalf("Intern of the erased ID after recovery: %v, want ErrErased", err)
	}
	if m2.Live(online.Users) != m.Live(online.Users) || m2.Live(online.Users) != 300 {
		t.Fatalf("recovered %d live users, live model %d, want 300", m2.Live(online.Users), m.Live(online.Users))
	}
	t.Logf("%d snapshots, %d files left; counts %+v", snaps, len(files), c)
}
