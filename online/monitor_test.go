package online

import (
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"gonum.org/v1/gonum/stat"
)

func newTestMonitor(t *testing.T, o MonitorOptions) *Monitor {
	t.Helper()
	m, err := NewMonitor(o)
	if err != nil {
		t.Fatal(err)
	}
	return m
}

func TestMonitorOptions(t *testing.T) {
	m := newTestMonitor(t, MonitorOptions{})
	o := m.Options()
	if o.Mode != Explicit || o.MinValue != 1 || o.MaxValue != 5 || o.Alpha != 0.999 || o.Window != 10000 ||
		o.Delta != 0.005 || o.Lambda != 50 || o.MinSamples != 30 || o.ADWIN || o.ADWINDelta != 0.002 || o.TopN != 10 {
		t.Errorf("defaults not applied: %+v", o)
	}
	tests := []struct {
		name  string
		o     MonitorOptions
		field string
	}{
		{"mode", MonitorOptions{Mode: 9}, "Mode"},
		{"scale", MonitorOptions{MinValue: 5, MaxValue: 1}, "MaxValue"},
		{"alpha", MonitorOptions{Alpha: 1.5}, "Alpha"},
		{"alpha one", MonitorOptions{Alpha: 1}, "Alpha"},
		{"window", MonitorOptions{Window: -3}, "Window"},
		{"window huge", MonitorOptions{Window: MaxMonitorWindow + 1}, "Window"},
		{"delta", MonitorOptions{Delta: math.NaN()}, "Delta"},
		{"lambda", MonitorOptions{Lambda: -1}, "Lambda"},
		{"min samples", MonitorOptions{MinSamples: -1}, "MinSamples"},
		{"adwin delta", MonitorOptions{ADWIN: true, ADWINDelta: 2}, "ADWINDelta"},
		{"top n", MonitorOptions{TopN: -1}, "TopN"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := NewMonitor(tt.o)
			if err == nil || !strings.Contains(err.Error(), "option "+tt.field+" ") {
				t.Errorf("error %v, want one naming %s", err, tt.field)
			}
		})
	}
	// Implicit mode ignores the rating scale.
	if _, err := NewMonitor(MonitorOptions{Mode: Implicit, MinValue: 3, MaxValue: 3}); err != nil {
		t.Errorf("implicit mode rejected a rating scale it ignores: %v", err)
	}
}

func TestMonitorGlobalMeanIdentity(t *testing.T) {
	// Fact: the RMSE of the constant predictor μ = mean(r) on the ratings it
	// was fit to is the population standard deviation of r (RMSE² =
	// (1/n) Σ (r − μ)² by definition). Reference value from gonum's
	// stat.PopStdDev. Tolerance 1e-12: two float64 sums of 20,000 squares.
	rng := rand.New(rand.NewPCG(31, 32))
	r := make([]float64, 20_000)
	for i := range r {
		r[i] = 0.5 + 0.5*float64(rng.IntN(10)) // half stars 0.5…5
	}
	mean := stat.Mean(r, nil)
	m := newTestMonitor(t, MonitorOptions{MinValue: 0.5, MaxValue: 5, Window: len(r)})
	for _, x := range r {
		m.ObserveRating(mean, x, false, false)
	}
	st := m.Status()
	want := stat.PopStdDev(r, nil)
	if math.Abs(st.RMSEWindow-want) > 1e-12 {
		t.Errorf("window RMSE %.15f, population standard deviation %.15f", st.RMSEWindow, want)
	}
	if got := math.Sqrt(st.SquaredErrorTotal / float64(st.Events)); math.Abs(got-want) > 1e-12 {
		t.Errorf("all-time RMSE %.15f, want %.15f", got, want)
	}
	// MAE against the mean absolute deviation, computed directly.
	var mad float64
	for _, x := range r {
		mad += math.Abs(x - mean)
	}
	if math.Abs(st.MAEWindow-mad/float64(len(r))) > 1e-12 {
		t.Errorf("window MAE %v, mean absolute deviation %v", st.MAEWindow, mad/float64(len(r)))
	}
	if st.WindowEvents != len(r) || st.Events != uint64(len(r)) {
		t.Errorf("window holds %d of %d events", st.WindowEvents, st.Events)
	}
}

func TestMonitorExplicitDrift(t *testing.T) {
	// Error 0.2 on a 1–5 scale (normalised (0.2/4)² = 0.0025) for 2000
	// ratings, then error 3 (normalised 0.5625). Page-Hinkley must alarm
	// exactly where the reference loop over the normalised losses does
	// (phReference, the recurrence written out); ADWIN must detect the step
	// within its check clock plus a few dozen ratings (the shift, 0.56,
	// exceeds ε_cut(2000, 30) ≈ 0.51 once 30 new errors are in).
	m := newTestMonitor(t, MonitorOptions{ADWIN: true})
	var losses []float64
	var firstPH, firstADWIN int
	for i := range 4000 {
		e := 0.2
		if i >= 2000 {
			e = 3
		}
		losses = append(losses, (e/4)*(e/4))
		ph, ad := m.phAlarms, m.adwinAlarms
		if !m.ObserveRating(4-e, 4, i%10 == 0, i%4 == 0) {
			continue
		}
		if m.phAlarms > ph && firstPH == 0 {
			firstPH = i + 1
		}
		if m.adwinAlarms > ad && firstADWIN == 0 {
			firstADWIN = i + 1
		}
	}
	st := m.Status()
	if want := phReference(losses, 0.005, 50, 30); firstPH != want {
		t.Errorf("first Page-Hinkley alarm at event %d, reference loop %d", firstPH, want)
	}
	if firstADWIN <= 2000 || firstADWIN > 2100 {
		t.Errorf("first ADWIN alarm at event %d, want in (2000, 2100]", firstADWIN)
	}
	if st.PHAlarms < 1 || st.ADWINAlarms < 1 {
		t.Errorf("alarms: Page-Hinkley %d, ADWIN %d; want both ≥ 1", st.PHAlarms, st.ADWINAlarms)
	}
	if st.LastAlarmEvent < uint64(max(firstPH, firstADWIN)) {
		t.Errorf("last alarm event %d before the first alarms %d, %d", st.LastAlarmEvent, firstPH, firstADWIN)
	}
	// Cold-start shares: every 10th user, every 4th item; either = 1/10 +
	// 1/4 − 1/20 (inclusion–exclusion).
	if st.ColdUser != 400 || st.ColdItem != 1000 || st.ColdEither != 1200 ||
		math.Abs(st.ColdEitherShare-0.3) > 1e-15 || math.Abs(st.ColdUserShare-0.1) > 1e-15 {
		t.Errorf("cold start: %d %d %d shares %v %v", st.ColdUser, st.ColdItem, st.ColdEither,
			st.ColdUserShare, st.ColdEitherShare)
	}
	// The window (10000) holds all 4000 errors: RMSE² = (2000·0.04 + 2000·9)/4000.
	if want := math.Sqrt((2000*0.04 + 2000*9) / 4000.0); math.Abs(st.RMSEWindow-want) > 1e-12 {
		t.Errorf("window RMSE %v, want %v", st.RMSEWindow, want)
	}
	if math.Abs(st.MAEWindow-1.6) > 1e-12 {
		t.Errorf("window MAE %v, want 1.6", st.MAEWindow)
	}
	// The fading RMSE has forgotten the early errors: α^2000 ≈ 0.135 weight.
	if st.RMSEFading < 2.7 || st.RMSEFading > 3 {
		t.Errorf("fading RMSE %v, want close to 3", st.RMSEFading)
	}
}

func TestMonitorImplicit(t *testing.T) {
	// Recall@N evaluations: hit rate 0.6 for 3000 evaluations, then 0.1;
	// the detectors watch the miss indicator, so the fall must alarm. λ is
	// raised to 100 here: on a Bernoulli miss stream with variance 0.24 the
	// default λ = 50 gives a false alarm every ~23,000 evaluations on
	// average (measured by simulation; see the Monitor doc), too often for a
	// 3000-evaluation quiet phase; with λ = 100 about one per 220,000.
	rng := rand.New(rand.NewPCG(33, 34))
	m := newTestMonitor(t, MonitorOptions{Mode: Implicit, Window: 1000, ADWIN: true, TopN: 20, Lambda: 100})
	var first int
	for i := range 6000 {
		m.ObservePositive(0.7, false, i%3 == 0)
		p := 0.6
		if i >= 3000 {
			p = 0.1
		}
		if m.ObserveHit(rng.Float64() < p) && first == 0 {
			first = i + 1
		}
	}
	if first <= 3000 || first > 3300 {
		t.Errorf("first alarm at evaluation %d, want in (3000, 3300]", first)
	}
	st := m.Status()
	if st.RecallN != 20 || st.Evaluations != 6000 || st.RecallWindowEvals != 1000 {
		t.Errorf("status %+v", st)
	}
	if math.Abs(st.RecallWindow-0.1) > 0.04 {
		t.Errorf("window recall %v, want about 0.1", st.RecallWindow)
	}
	// Error against target 1 is 0.3 for every event.
	if math.Abs(st.RMSEWindow-0.3) > 1e-12 || math.Abs(st.MAEFading-0.3) > 1e-12 {
		t.Errorf("RMSE %v MAE %v, want 0.3", st.RMSEWindow, st.MAEFading)
	}
	if st.ColdItem != 2000 || st.ColdEither != 2000 || st.ColdUser != 0 {
		t.Errorf("cold counts %d %d %d", st.ColdUser, st.ColdItem, st.ColdEither)
	}
	// ObserveRating belongs to the other mode.
	if m.ObserveRating(1, 2, false, false) || m.Status().Skipped != 1 || m.Status().Events != 6000 {
		t.Error("ObserveRating in implicit mode was not skipped")
	}
}

func TestMonitorSkipsNonFinite(t *testing.T) {
	m := newTestMonitor(t, MonitorOptions{})
	m.ObserveRating(3, 4, false, false)
	for _, p := range []float64{math.NaN(), math.Inf(1), 1e200} {
		m.ObserveRating(p, 4, true, true)
	}
	st := m.Status()
	if st.Events != 1 || st.Skipped != 3 || st.ColdEither != 0 || st.RMSEFading != 1 {
		t.Errorf("after 1 good and 3 bad events: %+v", st)
	}
}

// feedMixed drives m through a stream with a change halfway, from event
// index lo to hi, deterministically.
func feedMixed(m *Monitor, lo, hi int) {
	for i := lo; i < hi; i++ {
		rng := rand.New(rand.NewPCG(uint64(i), 99))
		e := rng.NormFloat64() * 0.3
		if i > 3000 {
			e *= 4
		}
		if m.o.Mode == Explicit {
			m.ObserveRating(3+e, 3, rng.IntN(7) == 0, rng.IntN(5) == 0)
		} else {
			m.ObservePositive(0.5+e, rng.IntN(7) == 0, false)
		}
		if i%3 == 0 {
			m.ObserveHit(rng.Float64() < 0.5-float64(i)/20000)
		}
	}
}

func TestMonitorStateRoundTrip(t *testing.T) {
	for _, o := range []MonitorOptions{
		{Mode: Explicit, Window: 700, ADWIN: true, Alpha: 0.99},
		{Mode: Implicit, Window: 500, ADWIN: true},
		{Mode: Explicit, Window: 100},
	} {
		t.Run(o.Mode.String(), func(t *testing.T) {
			whole := newTestMonitor(t, o)
			feedMixed(whole, 0, 6000)

			first := newTestMonitor(t, o)
			feedMixed(first, 0, 2345)
			b, err := first.MarshalState()
			if err != nil {
				t.Fatal(err)
			}
			resumed := newTestMonitor(t, o)
			if err := resumed.UnmarshalState(b); err != nil {
				t.Fatal(err)
			}
			if resumed.Status() != first.Status() {
				t.Fatalf("restored status differs:\n%+v\n%+v", resumed.Status(), first.Status())
			}
			feedMixed(resumed, 2345, 6000)
			// Exact equality: the restore is bit-exact and the arithmetic
			// after it is the same sequence of operations.
			if got, want := resumed.Status(), whole.Status(); got != want {
				t.Errorf("resumed run differs from the uninterrupted one:\n%+v\n%+v", got, want)
			}
			if whole.Status().PHAlarms+whole.Status().ADWINAlarms == 0 {
				t.Log("note: no alarm in this stream")
			}
		})
	}
}

func TestMonitorStateAdapts(t *testing.T) {
	a := newTestMonitor(t, MonitorOptions{Window: 1000, ADWIN: true})
	feedMixed(a, 0, 4000)
	b, err := a.MarshalState()
	if err != nil {
		t.Fatal(err)
	}
	// A smaller window keeps the newest errors.
	small := newTestMonitor(t, MonitorOptions{Window: 10})
	if err := small.UnmarshalState(b); err != nil {
		t.Fatal(err)
	}
	vals := a.errWin.valuesTo(nil)
	var s float64
	for _, v := range vals[len(vals)-10:] {
		s += v * v
	}
	if got := small.Status().RMSEWindow; math.Abs(got-math.Sqrt(s/10)) > 1e-12 {
		t.Errorf("shrunk window RMSE %v, want %v", got, math.Sqrt(s/10))
	}
	if small.Status().Events != 4000 || small.Status().ADWINWidth != 0 {
		t.Errorf("adapted status %+v", small.Status())
	}

	// Errors name the field and leave the monitor unchanged.
	impl := newTestMonitor(t, MonitorOptions{Mode: Implicit})
	before := impl.Status()
	for _, tc := range []struct{ in, field string }{
		{string(b), `"mode"`},
		{`{"format":7}`, `"format"`},
		{`not json`, "monitor state"},
	} {
		if err := impl.UnmarshalState([]byte(tc.in)); err == nil || !strings.Contains(err.Error(), tc.field) {
			t.Errorf("UnmarshalState(%.30q) error %v, want one naming %s", tc.in, err, tc.field)
		}
	}
	bad := strings.Replace(string(b), `"since":`, `"since":-1,"ignored":`, 1)
	if err := small.UnmarshalState([]byte(bad)); err == nil || !strings.Contains(err.Error(), "error_window") {
		t.Errorf("negative since: error %v, want one naming error_window", err)
	}
	huge := strings.Replace(string(b), `"sq_total":{"s":`, `"sq_total":{"s":1e300,"ignored":`, 1)
	if err := small.UnmarshalState([]byte(huge)); err == nil || !strings.Contains(err.Error(), "sq_total") {
		t.Errorf("total 1e300: error %v, want one naming sq_total", err)
	}
	if impl.Status() != before {
		t.Error("a failed UnmarshalState changed the monitor")
	}
}

func TestMonitorDoesNotAllocate(t *testing.T) {
	for _, mode := range []Mode{Explicit, Implicit} {
		m := newTestMonitor(t, MonitorOptions{Mode: mode, ADWIN: true, Window: 100})
		rng := rand.New(rand.NewPCG(35, 36))
		f := func() {
			if mode == Explicit {
				m.ObserveRating(rng.Float64()*4+1, 3, rng.IntN(2) == 0, false)
			} else {
				m.ObservePositive(rng.Float64(), false, rng.IntN(2) == 0)
			}
			m.ObserveHit(rng.IntN(3) == 0)
		}
		if n := testing.AllocsPerRun(5000, f); n != 0 {
			t.Errorf("%v: Observe* allocate %.0f times per event, want 0", mode, n)
		}
		if n := testing.AllocsPerRun(100, func() { _ = m.Status() }); n != 0 {
			t.Errorf("%v: Status allocates %.0f times, want 0", mode, n)
		}
	}
}

func BenchmarkMonitorObserveRating(b *testing.B) {
	for _, adwin := range []bool{false, true} {
		b.Run(fmt.Sprintf("adwin=%v", adwin), func(b *testing.B) {
			m, err := NewMonitor(MonitorOptions{ADWIN: adwin})
			if err != nil {
				b.Fatal(err)
			}
			rng := rand.New(rand.NewPCG(1, 1))
			for b.Loop() {
				m.ObserveRating(rng.Float64()*4+1, 3, false, false)
			}
		})
	}
}

func FuzzMonitorUnmarshalState(f *testing.F) {
	// UnmarshalState must never panic, and a state it accepts must leave a
	// monitor that keeps working.
	for _, o := range []MonitorOptions{{Window: 8, ADWIN: true}, {Mode: Implicit, Window: 8, ADWIN: true}} {
		m, err := NewMonitor(o)
		if err != nil {
			f.Fatal(err)
		}
		feedMixed(m, 0, 100)
		b, err := m.MarshalState()
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
	f.Add([]byte(`{"format":1,"mode":"explicit","error_window":{"size":3,"head":2,"values":"AAAAAAAA8D8="}}`))
	f.Fuzz(func(t *testing.T, b []byte) {
		for _, mode := range []Mode{Explicit, Implicit} {
			m, err := NewMonitor(MonitorOptions{Mode: mode, Window: 5, ADWIN: true})
			if err != nil {
				t.Fatal(err)
			}
			if m.UnmarshalState(b) != nil {
				continue
			}
			for i := range 70 {
				m.ObserveRating(3, float64(i%5), i%2 == 0, false)
				m.ObservePositive(0.5, false, false)
				m.ObserveHit(i%3 == 0)
			}
			if _, err := m.MarshalState(); err != nil {
				t.Fatalf("accepted state then failed to marshal: %v", err)
			}
		}
	})
}
