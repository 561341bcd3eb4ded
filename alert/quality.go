package alert

import (
	"fmt"
	"math"
	"time"

	"driftfit/rolling"
)

// Detectors configure the step and data-quality detectors of a rule.
// Each is off in the zero value. None opens a ticket unless its kind is
// in Rule.TicketKinds.
type Detectors struct {
	// Step tells a step from drift (StepDetector); on when Step.On.
	Step StepSettings
	// Flatline finds a stuck sensor (FlatlineDetector); on when
	// Flatline.For > 0.
	Flatline FlatlineSettings
	// Spike finds robust outliers (SpikeDetector); on when Spike.K > 0.
	Spike SpikeSettings
	// Silent is how long without a reading makes a sensor silent
	// (Silence); 0 is off.
	Silent time.Duration
	// OutOfSpan reports readings beyond SpanLower .. SpanUpper
	// (SpanCheck); needs the span.
	OutOfSpan bool
}

func (d Detectors) resolve() Detectors {
	if d.Step.On {
		h := d.Step.H
		d.Step = d.Step.resolve()
		d.Step.H = h // zero: from the budget (Tracker.StepSettings)
	}
	if d.Flatline.For > 0 {
		d.Flatline = d.Flatline.resolve()
	}
	if d.Spike.K > 0 {
		d.Spike = d.Spike.resolve()
	}
	return d
}

func (d Detectors) check(r *Rule, bad func(string, any, string)) {
	if d.Step.On {
		s := d.Step
		if s.H == 0 {
			s.H = defaultStepH // checked once the budget sets it
		}
		s.check("Detect.Step", bad)
	}
	if d.Flatline.For < 0 {
		bad("Detect.Flatline.For", d.Flatline.For, "must be >= 0 (0 = off)")
	}
	if d.Flatline.For > 0 {
		if d.Flatline.MinCount < 2 {
			bad("Detect.Flatline.MinCount", d.Flatline.MinCount, "must be >= 2")
		}
		if !(d.Flatline.Resolution >= 0) || !finite(d.Flatline.Resolution) {
			bad("Detect.Flatline.Resolution", d.Flatline.Resolution, "must be finite and >= 0")
		}
	}
	if !(d.Spike.K >= 0) || !finite(d.Spike.K) {
		bad("Detect.Spike.K", d.Spike.K, "must be finite and >= 0 (0 = off)")
	}
	if d.Spike.K > 0 {
		if d.Spike.K < 3 {
			bad("Detect.Spike.K", d.Spike.K, "must be >= 3: a smaller threshold rejects ordinary readings")
		}
		if d.Spike.Count < 1 {
			bad("Detect.Spike.Count", d.Spike.Count, "must be >= 1")
		}
		if d.Spike.Within <= 0 {
			bad("Detect.Spike.Within", d.Spike.Within, "must be > 0")
		}
		if d.Spike.Warmup < 2 {
			bad("Detect.Spike.Warmup", d.Spike.Warmup, "must be >= 2")
		}
		if d.Spike.MaxRun < 1 {
			bad("Detect.Spike.MaxRun", d.Spike.MaxRun, "must be >= 1")
		}
	}
	if d.Silent < 0 {
		bad("Detect.Silent", d.Silent, "must be >= 0 (0 = off)")
	}
	if d.OutOfSpan && !(r.SpanLower < r.SpanUpper) {
		bad("Detect.OutOfSpan", d.OutOfSpan, "needs SpanLower < SpanUpper")
	}
}

// FlatlineSettings configure a FlatlineDetector.
type FlatlineSettings struct {
	// For is how long the readings must stay within Resolution of each
	// other; 0 is off.
	For time.Duration
	// MinCount is the least number of readings in the run. Zero means
	// 10 (our choice: fewer readings over For say more about a slow
	// reporting rate than about a stuck value). At least 2.
	MinCount int
	// Resolution is the largest spread (max − min) of a stuck run, in
	// the sensor's unit. Zero means exactly equal values; set it to the
	// transmitter's resolution (one count of its converter) when a
	// stuck sensor still dithers by one count.
	Resolution float64
}

func (s FlatlineSettings) resolve() FlatlineSettings {
	if s.MinCount == 0 {
		s.MinCount = 10
	}
	return s
}

// FlatlineDetector finds a stuck value: a run of readings whose spread
// stays within the resolution for the configured time and count. O(1)
// per reading: it keeps the run's first time, count, minimum and
// maximum. A reading that widens the spread beyond the resolution starts
// a new run with itself. A value: copy it to keep its state; not safe
// for concurrent use.
type FlatlineDetector struct {
	s        FlatlineSettings
	n        int
	first    time.Time
	min, max float64
}

// Result is what a data-quality detector found at one reading or check.
type Result struct {
	// Active says the condition holds now.
	Active bool
	// Since is when the condition began (the run's first reading, the
	// last reading before the silence, the first spike of the run);
	// zero when not Active.
	Since time.Time
	// Value is the detector's measure (see the kind): flatline and
	// silent in days, spike in robust standard deviations, out of span
	// the reading.
	Value float64
	// Limit is the threshold Value is judged against, in the same unit.
	Limit float64
	// N is the readings (or spikes) the result rests on.
	N int
}

// NewFlatlineDetector returns a detector with zero fields of s set to
// their defaults; an error wrapping ErrBadRule for invalid settings.
func NewFlatlineDetector(s FlatlineSettings) (FlatlineDetector, error) {
	s = s.resolve()
	var errs []error
	Detectors{Flatline: s}.check(&Rule{}, func(f string, v any, r string) { errs = append(errs, &RuleError{Field: f, Value: v, Reason: r}) })
	if s.For <= 0 {
		errs = append(errs, &RuleError{Field: "Detect.Flatline.For", Value: s.For, Reason: "must be > 0"})
	}
	if len(errs) > 0 {
		return FlatlineDetector{}, errs[0]
	}
	return FlatlineDetector{s: s}, nil
}

// Update feeds one reading, in time order, and returns whether the
// sensor is stuck: Value is the run's length in days, Limit For in days.
// A non-finite value is ignored (the caller counts it as bad input).
func (d *FlatlineDetector) Update(at time.Time, v float64) Result {
	if !finite(v) {
		return d.result(at)
	}
	lo, hi := min(d.min, v), max(d.max, v)
	if d.n == 0 || hi-lo > d.s.Resolution || at.Before(d.first) {
		d.n, d.first, d.min, d.max = 0, at, v, v
		lo, hi = v, v
	}
	d.n++
	d.min, d.max = lo, hi
	return d.result(at)
}

func (d *FlatlineDetector) result(at time.Time) Result {
	r := Result{Limit: days(d.s.For), N: d.n}
	if d.n > 0 {
		r.Value = days(at.Sub(d.first))
	}
	if d.n >= d.s.MinCount && at.Sub(d.first) >= d.s.For {
		r.Active, r.Since = true, d.first
	}
	return r
}

// SpikeSettings configure a SpikeDetector.
type SpikeSettings struct {
	// K is the threshold: a reading whose error against the fit's
	// prediction exceeds K robust standard deviations is a spike. 0 is
	// off; at least 3. For normal noise, P(|e| > 6σ) = 2e-9 per reading
	// (our suggestion, 6: a fleet of 10⁴ sensors read each minute then
	// rejects about one good reading a month).
	K float64
	// Count spikes within Within raise the spike alert. Zero means 3.
	Count int
	// Within is the time over which Count spikes are counted. Zero
	// means 1h.
	Within time.Duration
	// Warmup is how many errors build the scale before any is judged.
	// Zero means 30 (as MinReadings).
	Warmup int
	// MaxRun is the most consecutive readings judged spikes: the next
	// one is accepted and the scale takes it in, since a run that long
	// is a change of level or noise, not a spike, and rejecting it
	// would keep good data out of the fits. Zero means 3.
	MaxRun int
}

func (s SpikeSettings) resolve() SpikeSettings {
	if s.Count == 0 {
		s.Count = 3
	}
	if s.Within == 0 {
		s.Within = time.Hour
	}
	if s.Warmup == 0 {
		s.Warmup = 30
	}
	if s.MaxRun == 0 {
		s.MaxRun = 3
	}
	return s
}

// SpikeDetector finds robust outliers: a reading whose error e against
// the fit's prediction (OneStepError's raw error, or any residual) has
// |e| > K·σ̂. The scale σ̂ is robust and O(1): an exponentially weighted
// mean absolute error over about 64 accepted readings (weight 1/32), of
// errors clipped at K·σ̂, times √(π/2) ≈ 1.2533 (the mean absolute
// deviation of a normal variable is σ·√(2/π); Huber, Robust Statistics,
// 1981, §5.1). Spikes do not update it; the caller keeps them out of the
// fits and counts them. A value; not safe for concurrent use.
type SpikeDetector struct {
	s      SpikeSettings
	n      int     // errors taken into the scale
	mad    float64 // weighted mean absolute error
	run    int     // consecutive spikes
	spikes int     // spikes in the counting period
	start  time.Time
	last   time.Time // newest spike
	worst  float64
}

// SpikeResult is one reading's verdict, with the alert's Result.
type SpikeResult struct {
	Result
	// Spike: keep this reading out of the fits and count it.
	Spike bool
	// Score is |e|/σ̂ (0 during warm-up).
	Score float64
}

// spikeWeight is the weight of the newest error in the scale (1/32,
// an effective memory of 2/w − 1 ≈ 63 readings).
const spikeWeight = 1.0 / 32

// NewSpikeDetector returns a detector with zero fields of s set to their
// defaults; an error wrapping ErrBadRule for invalid settings.
func NewSpikeDetector(s SpikeSettings) (SpikeDetector, error) {
	s = s.resolve()
	var errs []error
	Detectors{Spike: s}.check(&Rule{}, func(f string, v any, r string) { errs = append(errs, &RuleError{Field: f, Value: v, Reason: r}) })
	if s.K <= 0 {
		errs = append(errs, &RuleError{Field: "Detect.Spike.K", Value: s.K, Reason: "must be > 0"})
	}
	if len(errs) > 0 {
		return SpikeDetector{}, errs[0]
	}
	return SpikeDetector{s: s}, nil
}

// Scale returns σ̂, and false during warm-up.
func (d *SpikeDetector) Scale() (float64, bool) {
	return d.mad * math.Sqrt(math.Pi/2), d.n >= d.s.Warmup
}

// Update judges the error e of a reading at time at. A non-finite e is
// ignored.
func (d *SpikeDetector) Update(at time.Time, e float64) SpikeResult {
	var r SpikeResult
	if !finite(e) {
		r.Result = d.result(at)
		return r
	}
	a := math.Abs(e)
	sigma, warm := d.Scale()
	if warm && sigma > 0 {
		r.Score = a / sigma
	}
	if warm && a > d.s.K*sigma && d.run < d.s.MaxRun {
		d.run++
		r.Spike = true
		if d.spikes == 0 || at.Sub(d.start) > d.s.Within {
			d.spikes, d.start, d.worst = 0, at, 0
		}
		d.spikes++
		d.last = at
		d.worst = max(d.worst, r.Score)
		r.Result = d.result(at)
		return r
	}
	d.run = 0
	if warm {
		a = min(a, d.s.K*sigma)
		d.mad += spikeWeight * (a - d.mad)
	} else {
		d.mad += (a - d.mad) / float64(d.n+1) // plain mean while warming up
	}
	d.n = min(d.n+1, d.s.Warmup)
	r.Result = d.result(at)
	return r
}

func (d *SpikeDetector) result(at time.Time) Result {
	r := Result{Limit: d.s.K, N: d.spikes, Value: d.worst}
	if d.spikes >= d.s.Count && at.Sub(d.last) <= d.s.Within {
		r.Active, r.Since = true, d.start
	}
	return r
}

// Silence reports whether a sensor whose newest reading is at last is
// silent at now: no reading for at least after. Value and Limit are in
// days. A zero last (never a reading) is not judged: a sensor that never
// reported is a configuration matter, not a silent one.
func Silence(now, last time.Time, after time.Duration) Result {
	r := Result{Limit: days(after)}
	if last.IsZero() || after <= 0 {
		return r
	}
	r.Value = days(now.Sub(last))
	if now.Sub(last) >= after {
		r.Active, r.Since, r.N = true, last, 1
	}
	return r
}

// SpanCheck reports whether reading v lies beyond the calibrated range
// [lower, upper]: Value is v, Limit the bound it passed.
func SpanCheck(at time.Time, v, lower, upper float64) Result {
	r := Result{Value: v, N: 1}
	switch {
	case v < lower:
		r.Active, r.Limit = true, lower
	case v > upper:
		r.Active, r.Limit = true, upper
	default:
		r.Limit = upper
		if v-lower < upper-v {
			r.Limit = lower
		}
	}
	if r.Active {
		r.Since = at
	}
	return r
}

// Finding is what a detector reports to Tracker.Observe.
type Finding struct {
	// Kind is a detector kind: Step, Flatline, Spike, Silent, OutOfSpan.
	Kind Kind
	// Window is the window whose fit the detector ran on (Step); zero
	// for the kinds kept once per sensor.
	Window rolling.WindowSpec
	// Result is the detector's verdict. A Step finding is Active on the
	// update that signalled, with Since the change point and Value the
	// step size.
	Result
	// Severity of an active finding; zero means Warning.
	Severity Severity
	// Fit is the trend fit to base a ticket on, when the kind opens
	// tickets (Rule.TicketKinds); nil: no ticket. Coverage is its
	// window's pane coverage.
	Fit      *rolling.Fit
	Coverage float64
}

// Observe applies a detector's finding at time now to the alert of its
// kind (and window, for Step), with no debounce (the detectors confirm
// on their own) but with the rule's cooldown: an Active finding raises
// the alert, a later inactive one clears it. Events of detector kinds
// carry the finding's Value and Limit in the kind's report unit, First
// = Since and Last = now, and no fit (Model empty). A raise opens a
// ticket only when the kind is in Rule.TicketKinds, no ticket is open,
// the as-left value is known, and f.Fit is a usable line or parabola.
//
// Errors: ErrBadTime for a zero or unrepresentable now, ErrBadFinding
// for a kind that is not a detector kind or not set in the rule, a
// window not in the rule (Step) or a window given for a per-sensor kind,
// or a non-finite Value. The state is unchanged on error.
func (t *Tracker) Observe(now time.Time, f Finding) (Decision, error) {
	var d Decision
	if !timeOK(now) {
		return d, fmt.Errorf("%w: observation time %v", ErrBadTime, now)
	}
	now = utc(now)
	r := &t.rule
	k := f.Kind
	switch {
	case !k.valid() || k.FitKind():
		return d, fmt.Errorf("%w: sensor %s kind %v is not a detector kind", ErrBadFinding, t.sensor, k)
	case !r.on(k):
		return d, fmt.Errorf("%w: sensor %s kind %v is not set in the rule", ErrBadFinding, t.sensor, k)
	case k.PerWindow() && r.window(f.Window) < 0:
		return d, fmt.Errorf("%w: sensor %s kind %v window %s not in the rule", ErrBadFinding, t.sensor, k, WindowName(f.Window))
	case !k.PerWindow() && f.Window != (rolling.WindowSpec{}):
		return d, fmt.Errorf("%w: sensor %s kind %v is kept per sensor, got window %s", ErrBadFinding, t.sensor, k, WindowName(f.Window))
	case !finite(f.Value) || !finite(f.Limit):
		return d, fmt.Errorf("%w: sensor %s kind %v value %v limit %v", ErrBadFinding, t.sensor, k, f.Value, f.Limit)
	}
	sev := f.Severity
	if sev == SeverityUnknown || sev > Critical {
		sev = Warning
	}
	ev := evidence{valid: true, clear: !f.Active, value: f.Value, limit: f.Limit}
	if f.Active {
		ev.sev = sev
	}
	m := t.machine(f.Window, k)
	was := m.sev
	typ := m.step(now, &ev, 1, r.Cooldown)
	if typ == EventUnknown {
		return d, nil
	}
	e := t.event(typ, now, f.Window, m, k, &ev)
	if typ == Cleared {
		e.Severity = was
	}
	e.First, e.Last, e.N = utc(f.Since), now, f.N
	d.Events = append(d.Events, e)
	if typ == Raised && r.opensTicket(k) && !t.hasTicket && t.hasAsLeft && f.Fit != nil && r.usable(f.Fit) &&
		(f.Fit.Model == rolling.Line || f.Fit.Model == rolling.Parabola) {
		t.ticket, t.hasTicket = t.openTicket(now, f.Window, f.Coverage, f.Fit, [2]*rolling.Fit{}, k, m.sev), true
		tk := t.ticket
		d.Opened = &tk
	}
	return d, nil
}
