package online

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
)

// Defaults of MonitorOptions, taken for any zero field.
const (
	DefaultMonitorMinValue = 1.0     // explicit rating scale, low end: the common 1–5 stars
	DefaultMonitorMaxValue = 5.0     // explicit rating scale, high end
	DefaultMonitorAlpha    = 0.999   // fading factor: effective window ≈ 1000 events
	DefaultMonitorWindow   = 10000   // sliding window, events
	DefaultPHDelta         = 0.005   // Page-Hinkley δ
	DefaultPHLambda        = 50.0    // Page-Hinkley λ
	DefaultPHMinSamples    = 30      // Page-Hinkley n_min
	DefaultADWINDelta      = 0.002   // ADWIN δ
	DefaultRecallN         = 10      // N of recall@N
	MaxMonitorWindow       = 1 << 24 // largest sliding window accepted
	monitorStateFormat     = 1
	// monitorMaxError bounds the magnitude of an error accepted: beyond it an
	// event is skipped as non-finite. No rating scale comes near it, and it
	// keeps every running total of e² finite for more than 1e100 events.
	monitorMaxError = 1e100
	// monitorMaxStored bounds every number in a stored state.
	monitorMaxStored = 1e250
)

// MonitorOptions configure a Monitor. A zero field takes the default named in
// its comment.
type MonitorOptions struct {
	// Mode is Explicit or Implicit. If zero, Explicit.
	Mode Mode
	// MinValue and MaxValue bound the rating scale (explicit mode). The
	// detectors see the squared error normalised by the scale width,
	// ((r − r̂)/(max − min))², clipped to 1 for predictions outside the scale.
	// If both are zero, DefaultMonitorMinValue and DefaultMonitorMaxValue.
	// Ignored in implicit mode.
	MinValue, MaxValue float64
	// Alpha is the fading factor α in (0, 1) of the fading means. If zero,
	// DefaultMonitorAlpha.
	Alpha float64
	// Window is the length w of the sliding windows, in events (recall
	// evaluations for the recall window), 1 … MaxMonitorWindow. If zero,
	// DefaultMonitorWindow.
	Window int
	// Delta (δ ≥ 0), Lambda (λ > 0) and MinSamples (n_min ≥ 1) configure the
	// Page-Hinkley test. If zero, DefaultPHDelta, DefaultPHLambda and
	// DefaultPHMinSamples.
	Delta, Lambda float64
	MinSamples    int
	// ADWIN turns on the second detector, with confidence ADWINDelta in
	// (0, 1). If ADWINDelta is zero, DefaultADWINDelta.
	ADWIN      bool
	ADWINDelta float64
	// TopN is the N of the recall@N evaluations the trainer reports through
	// ObserveHit; the Monitor only records it in its Status. If zero,
	// DefaultRecallN.
	TopN int
}

// withDefaults fills zero fields and validates the result, naming the field
// at fault.
func (o MonitorOptions) withDefaults() (MonitorOptions, error) {
	if o.Mode == 0 {
		o.Mode = Explicit
	}
	if o.MinValue == 0 && o.MaxValue == 0 {
		o.MinValue, o.MaxValue = DefaultMonitorMinValue, DefaultMonitorMaxValue
	}
	if o.Alpha == 0 {
		o.Alpha = DefaultMonitorAlpha
	}
	if o.Window == 0 {
		o.Window = DefaultMonitorWindow
	}
	if o.Delta == 0 {
		o.Delta = DefaultPHDelta
	}
	if o.Lambda == 0 {
		o.Lambda = DefaultPHLambda
	}
	if o.MinSamples == 0 {
		o.MinSamples = DefaultPHMinSamples
	}
	if o.ADWINDelta == 0 {
		o.ADWINDelta = DefaultADWINDelta
	}
	if o.TopN == 0 {
		o.TopN = DefaultRecallN
	}
	finite := func(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }
	var errs []error
	bad := func(field, want string, got any) {
		errs = append(errs, fmt.Errorf("online: monitor option %s must be %s, got %v", field, want, got))
	}
	if o.Mode != Explicit && o.Mode != Implicit {
		bad("Mode", "Explicit or Implicit", o.Mode)
	}
	if o.Mode == Explicit {
		if !finite(o.MinValue) || !finite(o.MaxValue) || !(o.MaxValue > o.MinValue) ||
			!finite(o.MaxValue-o.MinValue) {
			bad("MaxValue", fmt.Sprintf("finite and above MinValue (%v)", o.MinValue), o.MaxValue)
		}
	}
	if !(o.Alpha > 0 && o.Alpha < 1) {
		bad("Alpha", "in (0, 1)", o.Alpha)
	}
	if o.Window < 1 || o.Window > MaxMonitorWindow {
		bad("Window", fmt.Sprintf("in 1…%d", MaxMonitorWindow), o.Window)
	}
	if !(o.Delta >= 0) || !finite(o.Delta) {
		bad("Delta", "finite and ≥ 0", o.Delta)
	}
	if !(o.Lambda > 0) || !finite(o.Lambda) {
		bad("Lambda", "finite and > 0", o.Lambda)
	}
	if o.MinSamples < 1 {
		bad("MinSamples", "≥ 1", o.MinSamples)
	}
	if !(o.ADWINDelta > 0 && o.ADWINDelta < 1) {
		bad("ADWINDelta", "in (0, 1)", o.ADWINDelta)
	}
	if o.TopN < 1 {
		bad("TopN", "≥ 1", o.TopN)
	}
	return o, errors.Join(errs...)
}

// Monitor is the prequential (test-then-train) monitor of one model. The
// trainer feeds it one event at a time with the prediction the model made
// before it learned that event (J. Gama, R. Sebastião, P. P. Rodrigues, "On
// evaluating stream learning algorithms", Machine Learning 90(3), 2013).
//
// It keeps, per event, the error e = r − r̂ (explicit) or e = 1 − r̂ against the
// positive target 1 (implicit), as
//
//	RMSE = sqrt(P(e²)),  MAE = P(|e|)
//
// with P the fading mean (factor α) and, separately, the sliding-window mean
// over the last w events, plus compensated all-time totals of e² and |e|.
// A fading RMSE over warm events only (user and item both seen before) is kept
// too, since cold-start predictions are expected to be poor. Recall@N is the
// fading and window mean of the hit indicator of the sampled evaluations the
// trainer reports with ObserveHit.
//
// # Drift
//
// Page-Hinkley, and ADWIN when enabled, watch a loss in [0, 1] whose mean
// rises when the model gets worse:
//
//   - explicit mode: the normalised squared error ((r − r̂)/(max − min))²,
//     clipped to 1, at every rating;
//   - implicit mode: the miss indicator 1 − hit of each sampled recall@N
//     evaluation. The per-event error against target 1 is not used: with
//     positive-only data it measures score scale more than ranking quality.
//
// Page-Hinkley's false alarms depend on the variance σ² of the loss. With
// the defaults (δ = 0.005, λ = 50) the normalised squared error of a steady
// model (σ² ≲ 0.01) practically never alarms, but a Bernoulli miss indicator
// does now and then. Treating m_t − M_t as Brownian motion with drift −δ
// reflected at 0 puts the mean interval between false alarms near
// (σ²/(2δ²))·(e^{2δλ/σ²} − 1 − 2δλ/σ²) (from memory), and a seeded simulation
// of 2,000,000 samples agreed: about 23,000 evaluations between false alarms
// at a miss rate of 0.4 (σ² = 0.24), about 500,000 at 0.9 (σ² = 0.09). Raise λ
// when the miss rate is near 0.5 (λ = 100 gave about 220,000 at 0.4).
//
// An alarm is counted per detector; Page-Hinkley restarts after its alarm and
// ADWIN shrinks its window. The Monitor only reports alarms: what to do about
// one is the trainer's choice.
//
// Events with a non-finite prediction or value, or an error beyond 1e100 in
// magnitude, are counted as skipped and change nothing else. A Monitor is pure (no clock, no goroutines, no
// logging), is not safe for concurrent use, and its Observe methods do not
// allocate.
type Monitor struct {
	o     MonitorOptions
	width float64 // MaxValue − MinValue (explicit)

	events, skipped                uint64
	coldUser, coldItem, coldEither uint64
	sqTotal, absTotal              Neumaier
	sqFade, absFade, warmSqFade    Fading
	errWin                         *Window // signed errors e

	evals, hits uint64
	hitFade     Fading
	hitWin      *Window

	ph                    *PageHinkley
	adwin                 *ADWIN // nil unless o.ADWIN
	phAlarms, adwinAlarms uint64
	lastAlarm             uint64
}

// NewMonitor returns an empty monitor. It returns an error naming each option
// out of range.
func NewMonitor(o MonitorOptions) (*Monitor, error) {
	o, err := o.withDefaults()
	if err != nil {
		return nil, err
	}
	m := &Monitor{
		o:          o,
		width:      o.MaxValue - o.MinValue,
		sqFade:     NewFading(o.Alpha),
		absFade:    NewFading(o.Alpha),
		warmSqFade: NewFading(o.Alpha),
		errWin:     NewWindow(o.Window),
		hitFade:    NewFading(o.Alpha),
		hitWin:     NewWindow(o.Window),
		ph:         NewPageHinkley(o.Delta, o.Lambda, o.MinSamples),
	}
	if o.ADWIN {
		m.adwin = NewADWIN(o.ADWINDelta)
	}
	return m, nil
}

// Options returns the options in use, defaults filled in.
func (m *Monitor) Options() MonitorOptions { return m.o }

// ObserveRating records one explicit rating: pred is the model's prediction
// made before learning the event, actual the rating, and coldUser / coldItem
// report whether the user / item had never been seen before this event. It
// feeds the drift detectors the normalised squared error and reports whether
// any of them alarmed. In implicit mode it records nothing but a skipped
// event.
func (m *Monitor) ObserveRating(pred, actual float64, coldUser, coldItem bool) (alarm bool) {
	if m.o.Mode != Explicit {
		m.skipped++
		return false
	}
	e := actual - pred
	if !m.record(e, coldUser, coldItem) {
		return false
	}
	z := e / m.width
	return m.detect(min(z*z, 1))
}

// ObservePositive records one implicit positive event: pred is the model's
// score for the observed (user, item) pair before learning it, and the error
// is taken against the target 1. It feeds no detector (see Monitor) and
// reports false; the result is there for symmetry with ObserveRating. In
// explicit mode it records nothing but a skipped event.
func (m *Monitor) ObservePositive(pred float64, coldUser, coldItem bool) (alarm bool) {
	if m.o.Mode != Implicit {
		m.skipped++
		return false
	}
	m.record(1-pred, coldUser, coldItem)
	return false
}

// record updates the error estimators and cold-start counts with error e and
// reports whether e was usable (finite, with a finite square).
func (m *Monitor) record(e float64, coldUser, coldItem bool) bool {
	if !(math.Abs(e) <= monitorMaxError) { // also false for NaN
		m.skipped++
		return false
	}
	sq := e * e
	ae := math.Abs(e)
	m.events++
	if coldUser {
		m.coldUser++
	}
	if coldItem {
		m.coldItem++
	}
	if coldUser || coldItem {
		m.coldEither++
	} else {
		m.warmSqFade.Add(sq)
	}
	m.sqTotal.Add(sq)
	m.absTotal.Add(ae)
	m.sqFade.Add(sq)
	m.absFade.Add(ae)
	m.errWin.Add(e)
	return true
}

// ObserveHit records the outcome of one sampled recall@N evaluation: whether
// the observed item was in the user's top N before the model learned the
// event. In implicit mode the miss indicator 1 − hit feeds the drift
// detectors and the result reports whether any alarmed; in explicit mode the
// recall figures are kept but no detector is fed.
func (m *Monitor) ObserveHit(hit bool) (alarm bool) {
	x := 0.0
	if hit {
		x = 1
		m.hits++
	}
	m.evals++
	m.hitFade.Add(x)
	m.hitWin.Add(x)
	if m.o.Mode != Implicit {
		return false
	}
	return m.detect(1 - x)
}

// detect feeds loss x in [0, 1] to the detectors.
func (m *Monitor) detect(x float64) bool {
	alarm := false
	if m.ph.Add(x) {
		m.phAlarms++
		alarm = true
	}
	if m.adwin != nil && m.adwin.Add(x) {
		m.adwinAlarms++
		alarm = true
	}
	if alarm {
		m.lastAlarm = m.events
	}
	return alarm
}

// MonitorStatus is a snapshot of a Monitor, plain data for a status page or
// metrics. Means over no data are reported as 0 (never NaN, so the struct
// always encodes as JSON); the counts tell whether there was data.
type MonitorStatus struct {
	Mode string `json:"mode"`
	// Events counts the events recorded; Skipped those refused (non-finite
	// input, or an Observe method of the other mode).
	Events  uint64 `json:"events"`
	Skipped uint64 `json:"skipped"`

	// Errors of the predictions (against target 1 in implicit mode).
	RMSEFading     float64 `json:"rmse_fading"`
	MAEFading      float64 `json:"mae_fading"`
	WarmRMSEFading float64 `json:"warm_rmse_fading"` // events with user and item both seen
	RMSEWindow     float64 `json:"rmse_window"`
	MAEWindow      float64 `json:"mae_window"`
	WindowEvents   int     `json:"window_events"` // events in the window, ≤ Window
	// SquaredErrorTotal and AbsErrorTotal are the all-time sums of e² and |e|
	// (compensated): RMSE over any range is sqrt(Δtotal/Δevents).
	SquaredErrorTotal float64 `json:"squared_error_total"`
	AbsErrorTotal     float64 `json:"abs_error_total"`

	// Recall@N of the sampled evaluations.
	RecallN           int     `json:"recall_n"`
	Evaluations       uint64  `json:"evaluations"`
	Hits              uint64  `json:"hits"`
	RecallFading      float64 `json:"recall_fading"`
	RecallWindow      float64 `json:"recall_window"`
	RecallWindowEvals int     `json:"recall_window_evaluations"`

	// Cold start: events whose user, item, or either was unseen, and their
	// shares of Events.
	ColdUser        uint64  `json:"cold_user"`
	ColdItem        uint64  `json:"cold_item"`
	ColdEither      uint64  `json:"cold_either"`
	ColdUserShare   float64 `json:"cold_user_share"`
	ColdItemShare   float64 `json:"cold_item_share"`
	ColdEitherShare float64 `json:"cold_either_share"`

	// Drift. PHAlarms counts Page-Hinkley alarms (one per change, as the
	// test restarts); ADWINAlarms counts the checks at which ADWIN's window
	// shrank, and one change may shrink it at a few successive checks.
	PHAlarms    uint64 `json:"ph_alarms"`
	ADWINAlarms uint64 `json:"adwin_alarms"`
	// LastAlarmEvent is the value of Events when the latest alarm was raised
	// (0: none yet).
	LastAlarmEvent uint64 `json:"last_alarm_event"`
	// PHStat is the Page-Hinkley statistic m_t − M_t; an alarm is raised
	// when it exceeds PHLambda.
	PHStat   float64 `json:"ph_stat"`
	PHLambda float64 `json:"ph_lambda"`
	// ADWINWidth and ADWINMean describe ADWIN's current window (0 when ADWIN
	// is off).
	ADWINWidth int64   `json:"adwin_width"`
	ADWINMean  float64 `json:"adwin_mean"`
}

// Status returns a snapshot of the monitor. It does not allocate.
func (m *Monitor) Status() MonitorStatus {
	s := MonitorStatus{
		Mode:              m.o.Mode.String(),
		Events:            m.events,
		Skipped:           m.skipped,
		RMSEFading:        math.Sqrt(m.sqFade.Mean()),
		MAEFading:         m.absFade.Mean(),
		WarmRMSEFading:    math.Sqrt(m.warmSqFade.Mean()),
		RMSEWindow:        math.Sqrt(m.errWin.MeanSquare()),
		MAEWindow:         m.errWin.MeanAbs(),
		WindowEvents:      m.errWin.Len(),
		SquaredErrorTotal: m.sqTotal.Value(),
		AbsErrorTotal:     m.absTotal.Value(),
		RecallN:           m.o.TopN,
		Evaluations:       m.evals,
		Hits:              m.hits,
		RecallFading:      m.hitFade.Mean(),
		RecallWindow:      m.hitWin.Mean(),
		RecallWindowEvals: m.hitWin.Len(),
		ColdUser:          m.coldUser,
		ColdItem:          m.coldItem,
		ColdEither:        m.coldEither,
		PHAlarms:          m.phAlarms,
		ADWINAlarms:       m.adwinAlarms,
		LastAlarmEvent:    m.lastAlarm,
		PHStat:            m.ph.Stat(),
		PHLambda:          m.o.Lambda,
	}
	if m.events > 0 {
		n := float64(m.events)
		s.ColdUserShare = float64(m.coldUser) / n
		s.ColdItemShare = float64(m.coldItem) / n
		s.ColdEitherShare = float64(m.coldEither) / n
	}
	if m.adwin != nil {
		s.ADWINWidth = m.adwin.Width()
		s.ADWINMean = m.adwin.Mean()
	}
	return s
}

// monitorState is the stored form of a Monitor (MarshalState).
type monitorState struct {
	Format      int         `json:"format"`
	Mode        string      `json:"mode"`
	Events      uint64      `json:"events"`
	Skipped     uint64      `json:"skipped"`
	ColdUser    uint64      `json:"cold_user"`
	ColdItem    uint64      `json:"cold_item"`
	ColdEither  uint64      `json:"cold_either"`
	SqTotal     Neumaier    `json:"sq_total"`
	AbsTotal    Neumaier    `json:"abs_total"`
	SqFade      fadingState `json:"sq_fading"`
	AbsFade     fadingState `json:"abs_fading"`
	WarmSqFade  fadingState `json:"warm_sq_fading"`
	ErrWin      windowState `json:"error_window"`
	Evals       uint64      `json:"evaluations"`
	Hits        uint64      `json:"hits"`
	HitFade     fadingState `json:"hit_fading"`
	HitWin      windowState `json:"hit_window"`
	PH          phState     `json:"page_hinkley"`
	ADWIN       *adwinState `json:"adwin,omitempty"`
	PHAlarms    uint64      `json:"ph_alarms"`
	ADWINAlarms uint64      `json:"adwin_alarms"`
	LastAlarm   uint64      `json:"last_alarm_event"`
}

// MarshalState encodes the monitor's full state as JSON (float64 values are
// written in Go's shortest round-trip form, so a restore is exact). The
// sliding windows are included: about 11 bytes per value held (error and
// recall windows, each up to w values).
func (m *Monitor) MarshalState() ([]byte, error) {
	st := monitorState{
		Format: monitorStateFormat, Mode: m.o.Mode.String(),
		Events: m.events, Skipped: m.skipped,
		ColdUser: m.coldUser, ColdItem: m.coldItem, ColdEither: m.coldEither,
		SqTotal: m.sqTotal, AbsTotal: m.absTotal,
		SqFade: m.sqFade.state(), AbsFade: m.absFade.state(), WarmSqFade: m.warmSqFade.state(),
		ErrWin: m.errWin.state(),
		Evals:  m.evals, Hits: m.hits, HitFade: m.hitFade.state(), HitWin: m.hitWin.state(),
		PH:       m.ph.state(),
		PHAlarms: m.phAlarms, ADWINAlarms: m.adwinAlarms, LastAlarm: m.lastAlarm,
	}
	if m.adwin != nil {
		a := m.adwin.state()
		st.ADWIN = &a
	}
	return json.Marshal(st)
}

// UnmarshalState restores a state written by MarshalState, replacing the
// monitor's state. Continuing from a restored state gives the same numbers as
// an uninterrupted run when the options are the same. A state written under
// other options is adapted: a window of another size keeps the newest values
// that fit; a new α, δ, λ or n_min applies from the next event; ADWIN turned on
// starts empty, turned off drops its state. A state of the other mode, or one
// that is malformed, is an error naming the field, and leaves m unchanged.
func (m *Monitor) UnmarshalState(b []byte) error {
	var st monitorState
	if err := json.Unmarshal(b, &st); err != nil {
		return fmt.Errorf("online: monitor state: %w", err)
	}
	bad := func(field, reason string) error {
		return fmt.Errorf("online: monitor state: field %q: %s", field, reason)
	}
	if st.Format != monitorStateFormat {
		return bad("format", fmt.Sprintf("unknown format %d", st.Format))
	}
	if st.Mode != m.o.Mode.String() {
		return bad("mode", fmt.Sprintf("state is %q, monitor is %q", st.Mode, m.o.Mode))
	}
	for _, w := range []struct {
		name string
		st   windowState
	}{{"error_window", st.ErrWin}, {"hit_window", st.HitWin}} {
		if r := checkWindowState(w.st); r != "" {
			return bad(w.name, r)
		}
	}
	for _, f := range []struct {
		name string
		st   fadingState
	}{{"sq_fading", st.SqFade}, {"abs_fading", st.AbsFade}, {"warm_sq_fading", st.WarmSqFade}, {"hit_fading", st.HitFade}} {
		if f.st.N < 0 || f.st.S < 0 {
			return bad(f.name, "negative sum or weight")
		}
	}
	within := func(xs ...float64) bool {
		for _, x := range xs {
			if !(math.Abs(x) <= monitorMaxStored) {
				return false
			}
		}
		return true
	}
	if !within(st.SqTotal.S, st.SqTotal.C, st.AbsTotal.S, st.AbsTotal.C) {
		return bad("sq_total", "total out of range")
	}
	if !within(st.ErrWin.Sum.S, st.ErrWin.Sum.C, st.ErrWin.Sq.S, st.ErrWin.Sq.C, st.ErrWin.Abs.S, st.ErrWin.Abs.C,
		st.HitWin.Sum.S, st.HitWin.Sum.C, st.HitWin.Sq.S, st.HitWin.Sq.C, st.HitWin.Abs.S, st.HitWin.Abs.C) {
		return bad("error_window", "total out of range")
	}
	if !within(st.SqFade.S, st.SqFade.N, st.AbsFade.S, st.AbsFade.N, st.WarmSqFade.S, st.WarmSqFade.N,
		st.HitFade.S, st.HitFade.N) {
		return bad("sq_fading", "sum or weight out of range")
	}
	if !within(st.PH.Mean, st.PH.M.S, st.PH.M.C, st.PH.Min) {
		return bad("page_hinkley", "statistic out of range")
	}
	if st.PH.T < 0 {
		return bad("page_hinkley", "negative sample count")
	}
	if st.ColdUser > st.Events || st.ColdItem > st.Events || st.ColdEither > st.Events {
		return bad("cold_either", "cold-start count above events")
	}
	if st.Hits > st.Evals {
		return bad("hits", "more hits than evaluations")
	}
	if st.ADWIN != nil {
		if r := checkADWINState(*st.ADWIN); r != "" {
			return bad("adwin", r)
		}
	}

	m.events, m.skipped = st.Events, st.Skipped
	m.coldUser, m.coldItem, m.coldEither = st.ColdUser, st.ColdItem, st.ColdEither
	m.sqTotal, m.absTotal = st.SqTotal, st.AbsTotal
	m.sqFade.setState(st.SqFade)
	m.absFade.setState(st.AbsFade)
	m.warmSqFade.setState(st.WarmSqFade)
	m.errWin.setState(st.ErrWin)
	m.evals, m.hits = st.Evals, st.Hits
	m.hitFade.setState(st.HitFade)
	m.hitWin.setState(st.HitWin)
	m.ph.setState(st.PH)
	if m.adwin != nil {
		if st.ADWIN != nil {
			m.adwin.setState(*st.ADWIN)
		} else {
			*m.adwin = *NewADWIN(m.o.ADWINDelta)
		}
	}
	m.phAlarms, m.adwinAlarms, m.lastAlarm = st.PHAlarms, st.ADWINAlarms, st.LastAlarm
	return nil
}
