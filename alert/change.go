package alert

import (
	"math"
	"sync"
	"time"

	"driftfit/rolling"
)

// StepSettings configure a StepDetector. The statistics work on
// standardised one-step-ahead prediction errors z (see OneStepError), so
// every setting is in standard deviations of z, whatever the sensor's
// unit.
type StepSettings struct {
	// On enables the Step kind in a Rule (Rule.Detect.Step); a
	// StepDetector ignores it.
	On bool
	// K is the CUSUM reference value: half the shift, in standard
	// deviations, the chart is tuned to find fastest. Zero means 0.5 (a
	// one-sigma step, the usual design; Montgomery, Introduction to
	// Statistical Quality Control, §9.1.3).
	K float64
	// H is the CUSUM decision interval. For NewStepDetector zero means
	// 4, which with K 0.5 gives an in-control average run length of 168
	// updates and finds a one-sigma step in 8.4 on average (Lucas &
	// Crosier 1982, Table 1): fit for tests and examples, far too many
	// false steps for a service (an hourly update would signal 52 times
	// a year on noise alone). In a Rule zero means the H whose run length
	// meets the rule's budget (Tracker.StepSettings).
	H float64
	// Lambda is the EWMA weight of the newest error, 0 < λ ≤ 1. Zero
	// means 0.2 (Montgomery §9.2: 0.05 ≤ λ ≤ 0.25 works well).
	Lambda float64
	// L is the EWMA limit in asymptotic standard deviations of the
	// EWMA, σ·√(λ/(2−λ)). Zero means 3 (NIST/SEMATECH e-Handbook
	// §6.3.2.4).
	L float64
}

// Defaults of StepSettings.
const (
	defaultStepK      = 0.5
	defaultStepH      = 4
	defaultStepLambda = 0.2
	defaultStepL      = 3
)

func (s StepSettings) resolve() StepSettings {
	if s.K == 0 {
		s.K = defaultStepK
	}
	if s.H == 0 {
		s.H = defaultStepH
	}
	if s.Lambda == 0 {
		s.Lambda = defaultStepLambda
	}
	if s.L == 0 {
		s.L = defaultStepL
	}
	return s
}

func (s StepSettings) check(field string, bad func(string, any, string)) {
	if !(s.K >= 0) || !finite(s.K) {
		bad(field+".K", s.K, "must be finite and >= 0")
	}
	if !(s.H > 0) || !finite(s.H) {
		bad(field+".H", s.H, "must be finite and > 0")
	}
	if !(s.Lambda > 0 && s.Lambda <= 1) {
		bad(field+".Lambda", s.Lambda, "must be in (0, 1]")
	}
	if !(s.L > 0) || !finite(s.L) {
		bad(field+".L", s.L, "must be finite and > 0")
	}
}

// StepDetector tells a step (a sudden change of level) from drift. It
// runs a two-sided tabular CUSUM (Page 1954) and an EWMA (Roberts 1959)
// on standardised one-step-ahead prediction errors: each new pane mean
// (or reading) against the value the fit predicted for it before it
// arrived, divided by that prediction's standard error (OneStepError).
//
// Why prediction errors and not in-window residuals: residuals of a
// least-squares fit are correlated and shrink towards the window's edges
// (their variance is σ²(1 − h_ii)), which breaks the run-length tables
// the thresholds come from. Prediction errors of a model that holds are
// independent with unit variance, as the tables assume. A slow drift
// the fit follows leaves them near zero; a step puts every error after
// it off by the step size until the window has absorbed it.
//
// The CUSUM confirms a step: S⁺ = max(0, S⁺ + z − K), S⁻ = max(0, S⁻ −
// z − K), a signal when either exceeds H. Its last zero before the signal
// dates the change (the first update after it is the first one the step
// affected, the change-point estimate of Page's scheme, Montgomery
// §9.1.3), and the mean of the raw errors since then estimates the step
// size. The EWMA, E = λz + (1 − λ)E starting at 0, is reported alongside
// with its limit; it is not needed for the signal.
//
// Update is O(1) and allocation-free. The zero StepDetector is not
// usable; make one with NewStepDetector. It is a value: copy it to keep
// its state. Not safe for concurrent use.
type StepDetector struct {
	s StepSettings

	n        uint64    // updates so far
	hi, lo   float64   // S⁺, S⁻
	hiN, loN uint32    // updates since S⁺, S⁻ last were zero
	hiSum    float64   // sum of raw errors over those updates
	loSum    float64   //
	hiStart  time.Time // time of the first update after S⁺ last was zero
	loStart  time.Time
	ewma     float64
}

// StepResult is what one StepDetector update found.
type StepResult struct {
	// Signal: a CUSUM exceeded H on this update. The detector then
	// restarts both sums; errors against a fit that has not absorbed
	// the step yet signal again about as many updates later, which
	// Tracker.Observe turns into one alert (firing, then the cooldown).
	Signal bool
	// Up says the step is upwards (S⁺ signalled).
	Up bool
	// Since is the estimated change time: the time of the first update
	// after the signalling sum was last zero. Zero unless Signal.
	Since time.Time
	// Size is the estimated step in the unit of the raw errors: their
	// mean over the updates since the change. Zero unless Signal.
	Size float64
	// Updates is how many updates the estimate spans.
	Updates int
	// Hi and Lo are the CUSUMs after this update (before any restart),
	// in standard deviations.
	Hi, Lo float64
	// EWMA is the EWMA of z after this update, and EWMAOut says it lies
	// beyond ±L·√(λ/(2−λ)) (asymptotic limits).
	EWMA    float64
	EWMAOut bool
}

// Finding returns the result as a Finding of kind Step on window w, for
// Tracker.Observe: active on a signal, with Since the change time, Value
// the step size and Limit the decision interval h. Report every update
// (or every pane close), so that the alert clears after the signal.
func (r StepResult) Finding(w rolling.WindowSpec, h float64) Finding {
	return Finding{Kind: Step, Window: w, Result: Result{Active: r.Signal, Since: r.Since, Value: r.Size, Limit: h, N: r.Updates}}
}

// NewStepDetector returns a detector with zero fields of s set to their
// defaults. It returns an error wrapping ErrBadRule for invalid settings.
func NewStepDetector(s StepSettings) (StepDetector, error) {
	s = s.resolve()
	var errs []error
	s.check("Step", func(f string, v any, r string) { errs = append(errs, &RuleError{Field: f, Value: v, Reason: r}) })
	if len(errs) > 0 {
		return StepDetector{}, errs[0]
	}
	return StepDetector{s: s}, nil
}

// Settings returns the detector's settings with defaults filled in.
func (d *StepDetector) Settings() StepSettings { return d.s }

// EWMALimit returns the half-width of the EWMA's control limits, in
// standard deviations of z: L·√(λ/(2−λ)), the asymptotic form (NIST/SEMATECH
// e-Handbook §6.3.2.4; Roberts 1959). The exact limit after t updates
// from a start at the target, L·√(λ/(2−λ)·(1 − (1−λ)^(2t))), is narrower;
// EWMALimitAt gives it.
func EWMALimit(lambda, l float64) float64 { return l * math.Sqrt(lambda/(2-lambda)) }

// EWMALimitAt returns the exact EWMA limit half-width after t updates
// started at the target: L·√(λ/(2−λ)·(1 − (1−λ)^(2t))) (Montgomery §9.2.1).
func EWMALimitAt(lambda, l float64, t int) float64 {
	return l * math.Sqrt(lambda/(2-lambda)*(1-math.Pow(1-lambda, 2*float64(t))))
}

// Update feeds one standardised error z, with the raw error e it came
// from (in the sensor's unit, for the size estimate) observed at time
// at. A non-finite z or e is ignored and returns the zero StepResult:
// the caller counts it as bad input.
func (d *StepDetector) Update(at time.Time, z, e float64) StepResult {
	if !finite(z) || !finite(e) {
		return StepResult{}
	}
	d.n++
	k := d.s.K
	if d.hi == 0 {
		d.hiN, d.hiSum, d.hiStart = 0, 0, at
	}
	if d.lo == 0 {
		d.loN, d.loSum, d.loStart = 0, 0, at
	}
	d.hi = max(0, d.hi+z-k)
	d.lo = max(0, d.lo-z-k)
	d.hiN++
	d.hiSum += e
	d.loN++
	d.loSum += e
	lam := d.s.Lambda
	d.ewma = lam*z + (1-lam)*d.ewma
	r := StepResult{Hi: d.hi, Lo: d.lo, EWMA: d.ewma, EWMAOut: math.Abs(d.ewma) > EWMALimit(lam, d.s.L)}
	switch {
	case d.hi > d.s.H && d.hi >= d.lo:
		r.Signal, r.Up, r.Since, r.Size, r.Updates = true, true, d.hiStart, d.hiSum/float64(d.hiN), int(d.hiN)
	case d.lo > d.s.H:
		r.Signal, r.Since, r.Size, r.Updates = true, d.loStart, d.loSum/float64(d.loN), int(d.loN)
	}
	if r.Signal {
		d.Restart()
	}
	return r
}

// Restart sets both CUSUMs and the EWMA back to zero, as after a signal
// or a calibration.
func (d *StepDetector) Restart() {
	s := d.s
	*d = StepDetector{s: s}
}

// OneStepError returns the standardised one-step-ahead prediction error
// of a new observation: the mean value of count readings at time at,
// against fit f made before they arrived (f must not contain them).
//
//	e = value − ŷ(τ),  z = e / √(s²/count + xᵀ·Cov·x)
//
// with ŷ(τ) the fitted curve at τ = at − f.Last in days, s the residual
// SD and x = (1, τ, τ²): the variance of a new mean of count independent
// readings plus that of the fitted mean (the prediction variance of a
// linear model, Draper & Smith, Applied Regression Analysis, §3.1). The
// standard error goes through seFor, so a serial-correlation correction
// applies here too once rolling provides it. ok is false when f is not
// usable, count < 1, the inputs are not finite, or the variance is not
// positive.
func OneStepError(f *rolling.Fit, at time.Time, value float64, count int) (z, e float64, ok bool) {
	if f == nil || !f.OK() || count < 1 || !finite(value) || dfFor(f) < 1 {
		return 0, 0, false
	}
	scale, ok := covScale(f)
	if !ok {
		return 0, 0, false
	}
	tau := float64(at.Sub(f.Last)) / float64(day)
	b := newBand(f)
	m, _ := b.at(tau)
	x := [3]float64{1, tau, tau * tau}
	var q float64
	p := f.Model.Coefs()
	for a := range p {
		for c := range p {
			q += x[a] * f.Cov[a][c] * x[c]
		}
	}
	v := scale * scale * (f.ResidSD*f.ResidSD/float64(count) + max(q, 0))
	e = value - m
	if !(v > 0) || !finite(v) || !finite(e) {
		return 0, 0, false
	}
	return e / math.Sqrt(v), e, true
}

// CUSUMARL returns the average run length of a two-sided tabular CUSUM
// with reference value k and decision interval h on N(shift, 1)
// observations, by the Markov chain approximation of Brook & Evans
// (1972) with states states per side (100 or more gives three
// significant digits for h ≤ 5), and the two sides combined as
// 1/ARL = 1/ARL⁺ + 1/ARL⁻ (exact for k ≥ 0 when the sides cannot both
// be non-zero; Lucas & Crosier 1982, eq. 2).
//
// Chain: the interval [0, h] is cut into m cells of width w = 2h/(2m−1),
// state 0 holding S = 0 and state j the midpoint j·w; a step from i
// moves to j with P((j−½)w < i·w + X − k ≤ (j+½)w), to 0 with
// P(i·w + X − k ≤ ½w), and beyond (m−½)w is absorbing (the signal).
// ARL = first element of (I − R)⁻¹·1. Costs O(m³); call it when a rule
// is built, not per reading. It returns +Inf when the chain does not
// leave (a singular system).
func CUSUMARL(k, h, shift float64, states int) float64 {
	up := oneSidedARL(k, h, shift, states)
	down := oneSidedARL(k, h, -shift, states)
	return 1 / (1/up + 1/down)
}

func oneSidedARL(k, h, mu float64, m int) float64 {
	if m < 2 {
		m = 2
	}
	w := 2 * h / float64(2*m-1)
	cdf := func(x float64) float64 { return 0.5 * math.Erfc(-(x-mu)/math.Sqrt2) }
	// a = I − R, row-major m×m, then solved in place for (I − R)·L = 1.
	a := make([]float64, m*m)
	b := make([]float64, m)
	for i := range m {
		si := float64(i) * w
		for j := range m {
			var p float64
			if j == 0 {
				p = cdf(k - si + w/2)
			} else {
				p = cdf(k-si+(float64(j)+0.5)*w) - cdf(k-si+(float64(j)-0.5)*w)
			}
			a[i*m+j] = -p
		}
		a[i*m+i]++
		b[i] = 1
	}
	// Gaussian elimination with partial pivoting.
	for c := range m {
		piv := c
		for r := c + 1; r < m; r++ {
			if math.Abs(a[r*m+c]) > math.Abs(a[piv*m+c]) {
				piv = r
			}
		}
		if a[piv*m+c] == 0 {
			return math.Inf(1)
		}
		if piv != c {
			for j := range m {
				a[c*m+j], a[piv*m+j] = a[piv*m+j], a[c*m+j]
			}
			b[c], b[piv] = b[piv], b[c]
		}
		for r := c + 1; r < m; r++ {
			f := a[r*m+c] / a[c*m+c]
			if f == 0 {
				continue
			}
			for j := c; j < m; j++ {
				a[r*m+j] -= f * a[c*m+j]
			}
			b[r] -= f * b[c]
		}
	}
	for r := m - 1; r >= 0; r-- {
		s := b[r]
		for j := r + 1; j < m; j++ {
			s -= a[r*m+j] * b[j]
		}
		b[r] = s / a[r*m+r]
	}
	return b[0]
}

// StepH returns the smallest decision interval h (to 1e-3) whose
// in-control two-sided average run length with reference value k is at
// least arl0 updates (CUSUMARL with 100 states), searching h in (0, 30].
// An alarm budget of α false signals per update asks for arl0 = 1/α.
//
// Results are remembered per (k, arl0), since rules of many sensors share
// them and one search costs about 30 ms.
func StepH(k, arl0 float64) float64 {
	key := [2]float64{k, arl0}
	stepHMu.Lock()
	h, ok := stepHMemo[key]
	stepHMu.Unlock()
	if ok {
		return h
	}
	h = searchStepH(k, arl0)
	stepHMu.Lock()
	stepHMemo[key] = h
	stepHMu.Unlock()
	return h
}

var (
	stepHMu   sync.Mutex
	stepHMemo = map[[2]float64]float64{}
)

func searchStepH(k, arl0 float64) float64 {
	lo, hi := 0.0, 30.0
	if CUSUMARL(k, hi, 0, 100) < arl0 {
		return hi
	}
	for hi-lo > 1e-3 {
		mid := (lo + hi) / 2
		if CUSUMARL(k, mid, 0, 100) >= arl0 {
			hi = mid
		} else {
			lo = mid
		}
	}
	return hi
}
