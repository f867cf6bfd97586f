package stream

import (
	"bytes"
	"context"
	"errors"
	"io"
	"math"
	"strconv"
	"strings"
	"testing"
)

func newScenario(t *testing.T, o ScenarioOptions, from Position) *Scenario {
	t.Helper()
	s, err := NewScenario(o, from)
	if err != nil {
		t.Fatalf("NewScenario: %v", err)
	}
	return s
}

// index parses the number of "listener-000123" or "show-0042".
func index(t *testing.T, id string) int {
	t.Helper()
	n, err := strconv.Atoi(id[strings.LastIndexByte(id, '-')+1:])
	if err != nil {
		t.Fatalf("bad ID %q", id)
	}
	return n
}

func TestScenarioDeterministicAndSeekable(t *testing.T) {
	o := ScenarioOptions{Seed: 7, Events: 3000, BatchSize: 100, ShiftAt: 1500}
	a, _, _ := drain(t, newScenario(t, o, Position{}))
	b, _, _ := drain(t, newScenario(t, o, Position{}))
	if len(a) != 3000 || len(b) != 3000 {
		t.Fatalf("got %d and %d events, want 3000", len(a), len(b))
	}
	for i := range a {
		if a[i] != b[i] {
			t.Fatalf("event %d differs between runs: %+v vs %+v", i, a[i], b[i])
		}
		if a[i].Offset != int64(i) || a[i].EventID != "ev-"+strconv.Itoa(i) {
			t.Fatalf("event %d has offset %d id %q", i, a[i].Offset, a[i].EventID)
		}
		if i > 0 && a[i].Time < a[i-1].Time {
			t.Fatalf("time runs backwards at %d", i)
		}
	}
	if a[0].Time != DefaultScenarioStart || a[100].Time != DefaultScenarioStart+1000 {
		t.Fatalf("times %d, %d; want start 2026-01-01 and 100 events per second", a[0].Time, a[100].Time)
	}
	// Resuming at any index regenerates exactly the same events.
	for _, at := range []int64{1, 99, 1499, 1500, 2999, 3000} {
		rest, _, _ := drain(t, newScenario(t, o, Position{Source: "scenario", Seed: 7, Offset: at}))
		if int64(len(rest)) != 3000-at {
			t.Fatalf("resume at %d: %d events", at, len(rest))
		}
		for i := range rest {
			if rest[i] != a[int(at)+i] {
				t.Fatalf("resume at %d: event %d differs", at, i)
			}
		}
	}
	c, _, _ := drain(t, newScenario(t, ScenarioOptions{Seed: 8, Events: 3000}, Position{}))
	same := 0
	for i := range c {
		if c[i].User == a[i].User && c[i].Value == a[i].Value {
			same++
		}
	}
	if same > 30 {
		t.Fatalf("seeds 7 and 8 share %d of 3000 events", same)
	}
	if _, err := NewScenario(o, Position{Source: "scenario", Seed: 9, Offset: 5}); err == nil {
		t.Fatal("resume with another seed succeeded")
	}
	if _, err := NewScenario(o, Position{Source: "scenario", Seed: 7, Offset: 3001}); err == nil {
		t.Fatal("resume beyond the end succeeded")
	}
}

// TestScenarioPlantedSignal measures the noise and the signal variance of the
// generated ratings against the planted truth.
func TestScenarioPlantedSignal(t *testing.T) {
	const n = 60000
	o := ScenarioOptions{Seed: 3, Events: n, ArrivalsUntil: 3000, Noise: 0.4, SNR: 5}
	s := newScenario(t, o, Position{})
	evs, _, _ := drain(t, s)
	var sr, srr, se, see float64
	m := 0
	for i, ev := range evs {
		if i < 3000 {
			continue // while the population grows the draws are not uniform
		}
		e := s.Expected(index(t, ev.User), index(t, ev.Item), int64(i))
		r := ev.Value - e
		sr, srr = sr+r, srr+r*r
		se, see = se+e, see+e*e
		m++
	}
	noiseVar := srr/float64(m) - (sr/float64(m))*(sr/float64(m))
	signalVar := see/float64(m) - (se/float64(m))*(se/float64(m))
	t.Logf("noise variance %.4f (σ² = %.4f), signal variance %.4f (target %.4f)", noiseVar, 0.16, signalVar, s.SignalVariance())
	// The variance of a sample variance of m normal draws is 2σ⁴/m (common
	// practice, a textbook identity): at
	// m = 57,000 its relative sd is 0.6%, so 3% is five standard deviations.
	if math.Abs(noiseVar/0.16-1) > 0.03 {
		t.Fatalf("noise variance %.4f, want σ² = 0.16 within 3%%", noiseVar)
	}
	// The signal variance holds exactly for the biases and in expectation for
	// p·q (it depends on how the 300 planted show vectors fall): allow 15%.
	if math.Abs(signalVar/s.SignalVariance()-1) > 0.15 {
		t.Fatalf("signal variance %.4f, want %.4f within 15%%", signalVar, s.SignalVariance())
	}
	if signalVar < 4*0.16 {
		t.Fatalf("signal variance %.4f below 4σ²", signalVar)
	}
	if got := len(s.PlantedItems(10)); got != 10 || len(s.PlantedItems(10)[3]) != DefaultScenarioRank {
		t.Fatalf("PlantedItems shape %d", got)
	}
}

// TestScenarioShift checks that the loss of the pre-shift truth rises by
// ShiftLoss at the shift index and not before.
func TestScenarioShift(t *testing.T) {
	const n, shift = 80000, 40000
	o := ScenarioOptions{Seed: 11, Events: n, ArrivalsUntil: 2000, ShiftAt: shift}
	s := newScenario(t, o, Position{})
	evs, _, _ := drain(t, s)
	var before, after float64
	var nb, na int
	for i, ev := range evs {
		if i < 2000 {
			continue
		}
		pre := s.Expected(index(t, ev.User), index(t, ev.Item), shift-1)
		d := (ev.Value - pre) * (ev.Value - pre)
		if i < shift {
			before += d
			nb++
		} else {
			after += d
			na++
		}
	}
	before /= float64(nb)
	after /= float64(na)
	sigma2 := s.Noise() * s.Noise()
	dl := s.ShiftLoss()
	t.Logf("MSE of the pre-shift truth: before %.4f, after %.4f; σ² %.4f, ShiftLoss %.4f", before, after, sigma2, dl)
	if math.Abs(before/sigma2-1) > 0.03 {
		t.Fatalf("MSE before the shift %.4f, want σ² = %.4f within 3%%", before, sigma2)
	}
	// (r − pre)² after the shift averages σ² + (Δc·q)²; the second term is a
	// sample mean of a skewed quantity over 40,000 draws: allow 8%.
	if math.Abs((after-sigma2)/dl-1) > 0.08 {
		t.Fatalf("MSE rise after the shift %.4f, want ShiftLoss %.4f within 8%%", after-sigma2, dl)
	}
	if dl < sigma2 {
		t.Fatalf("ShiftLoss %.4f smaller than σ²: the shift would be hard to see", dl)
	}
}

func TestScenarioArrivals(t *testing.T) {
	const n, until = 30000, 10000
	o := ScenarioOptions{Seed: 5, Events: n, Listeners: 800, Shows: 100, InitialListeners: 50, InitialShows: 10, ArrivalsUntil: until}
	evs, _, _ := drain(t, newScenario(t, o, Position{}))
	seenU := map[string]bool{}
	seenI := map[string]bool{}
	for i, ev := range evs {
		if i >= until && (!seenU[ev.User] || !seenI[ev.Item]) {
			t.Fatalf("event %d after arrivals ended names a new listener or show: %+v", i, ev)
		}
		seenU[ev.User], seenI[ev.Item] = true, true
		if i == until/2 && (len(seenU) > 50+380 || len(seenU) < 50+340) {
			t.Fatalf("halfway through arrivals %d listeners seen, want about 50 + 375", len(seenU))
		}
	}
	if len(seenU) != 800 || len(seenI) != 100 {
		t.Fatalf("%d listeners and %d shows seen, want 800 and 100", len(seenU), len(seenI))
	}
}

func TestScenarioImplicitPrefersAffinity(t *testing.T) {
	o := ScenarioOptions{Seed: 2, Events: 20000, Implicit: true, ArrivalsUntil: 1000}
	s := newScenario(t, o, Position{})
	evs, _, _ := drain(t, s)
	var played, random float64
	for i, ev := range evs[1000:] {
		u := index(t, ev.User)
		if ev.Value != 1 {
			t.Fatalf("implicit event value %v", ev.Value)
		}
		played += s.showBias[index(t, ev.Item)] + s.affinity(u, index(t, ev.Item), int64(i))
		j := (i * 7919) % s.Options().Shows
		random += s.showBias[j] + s.affinity(u, j, int64(i))
	}
	played /= float64(len(evs) - 1000)
	random /= float64(len(evs) - 1000)
	sd := math.Sqrt(s.SignalVariance())
	t.Logf("mean affinity of played shows %.3f, of arbitrary shows %.3f (signal sd %.3f)", played, random, sd)
	if played-random < sd {
		t.Fatalf("played shows have affinity %.3f, arbitrary ones %.3f: want a gap of at least one signal sd %.3f", played, random, sd)
	}
}

func TestScenarioClipAndRound(t *testing.T) {
	o := ScenarioOptions{Seed: 1, Events: 5000, ClipMin: 0.5, ClipMax: 5, Step: 0.5, SNR: 8}
	evs, _, _ := drain(t, newScenario(t, o, Position{}))
	for _, ev := range evs {
		if ev.Value < 0.5 || ev.Value > 5 || ev.Value*2 != math.Trunc(ev.Value*2) {
			t.Fatalf("rating %v not a half star in [0.5, 5]", ev.Value)
		}
	}
}

func TestScenarioWriteTo(t *testing.T) {
	o := ScenarioOptions{Seed: 4, Events: 700, BatchSize: 64}
	want, _, _ := drain(t, newScenario(t, o, Position{}))
	var buf bytes.Buffer
	n, err := newScenario(t, o, Position{}).WriteTo(&buf)
	if err != nil || n != int64(buf.Len()) {
		t.Fatalf("WriteTo = %d, %v; buffer has %d bytes", n, err, buf.Len())
	}
	d := NewJSONDecoder(DecodeOptions{RequireTime: true})
	lines := bytes.Split(bytes.TrimSuffix(buf.Bytes(), []byte("\n")), []byte("\n"))
	if len(lines) != len(want) {
		t.Fatalf("%d lines, want %d", len(lines), len(want))
	}
	for i, l := range lines {
		var b Batch
		if err := d.Decode(l, &b); err != nil {
			t.Fatalf("line %d: %v", i+1, err)
		}
		got := keep(&b.Events[0])
		got.Offset = int64(i)
		if got != want[i] {
			t.Fatalf("line %d decodes to %+v, want %+v", i+1, got, want[i])
		}
	}
	if _, err := newScenario(t, ScenarioOptions{}, Position{}).WriteTo(io.Discard); err == nil {
		t.Fatal("WriteTo of an endless scenario succeeded")
	}
}

func TestScenarioEndlessAndContext(t *testing.T) {
	s := newScenario(t, ScenarioOptions{Seed: 1}, Position{})
	for range 3 {
		b, err := s.Next(context.Background())
		if err != nil || b.Len() != DefaultBatchSize {
			t.Fatalf("Next = %v, %v", b, err)
		}
	}
	if p := s.batch.Pos; p.Source != "scenario" || p.Seed != 1 || p.Offset != 3*DefaultBatchSize {
		t.Fatalf("position %+v", p)
	}
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := s.Next(ctx); !errors.Is(err, context.Canceled) {
		t.Fatalf("Next with cancelled context: %v", err)
	}
	// After warm-up a batch costs no allocation.
	if n := testing.AllocsPerRun(20, func() { s.Next(context.Background()) }); n != 0 {
		t.Fatalf("Next allocates %.1f times per batch", n)
	}
}

func BenchmarkScenarioNext(b *testing.B) {
	for _, implicit := range []bool{false, true} {
		name := "explicit"
		if implicit {
			name = "implicit"
		}
		b.Run(name, func(b *testing.B) {
			s, err := NewScenario(ScenarioOptions{Seed: 1, Implicit: implicit}, Position{})
			if err != nil {
				b.Fatal(err)
			}
			b.ReportAllocs()
			for b.Loop() {
				s.Next(context.Background())
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*DefaultBatchSize), "ns/event")
		})
	}
}
