package rolling

import (
	"math"
	"time"
)

// Rebase re-expresses a Line or Parabola fit in the time variable
// τ' = (t − origin)/unit instead of τ = (t − Last)/day, returning the
// coefficients and their standard errors. It is exact algebra on the fit
// (a polynomial change of variable), useful to compare with coefficients
// published for another origin, or to report rates per hour or per year.
func (f *Fit) Rebase(origin time.Time, unit time.Duration) (coef, se [3]float64) {
	alpha := float64(unit) / nanosPerDay
	beta := float64(origin.Sub(f.Last)) / nanosPerDay
	p := f.Model.Coefs()
	t := [3][3]float64{
		{1, beta, beta * beta},
		{0, alpha, 2 * alpha * beta},
		{0, 0, alpha * alpha},
	}
	for r := 0; r < p; r++ {
		var v float64
		for k := 0; k < p; k++ {
			v += t[r][k] * f.Coef[k]
		}
		coef[r] = v
		var w float64
		for a := 0; a < p; a++ {
			for b := 0; b < p; b++ {
				w += t[r][a] * f.Cov[a][b] * t[r][b]
			}
		}
		se[r] = math.Sqrt(max(w, 0))
	}
	return coef, se
}

// Prediction is a fitted value at some time with its 95% prediction
// interval: the range that a single new reading at that time falls in with
// 95% probability if the model holds (Student's t with the fit's DF, on
// the residual variance plus the variance of the fitted curve).
type Prediction struct {
	Value, Low, High float64
}

// Predict returns the model's value at t. For Exp the value and interval
// are of y itself (the exponential of the fitted ln y).
func (f *Fit) Predict(t time.Time) (Prediction, error) {
	if !f.OK() {
		return Prediction{}, f.Err
	}
	tau := float64(t.Sub(f.Last)) / nanosPerDay
	m, half := f.band(tau)
	if f.Model == Exp {
		return Prediction{Value: math.Exp(m), Low: math.Exp(m - half), High: math.Exp(m + half)}, nil
	}
	return Prediction{Value: m, Low: m - half, High: m + half}, nil
}

// band returns the fitted value at τ days and the half-width of its 95%
// prediction interval.
func (f *Fit) band(tau float64) (value, half float64) {
	x := [3]float64{1, tau, tau * tau}
	p := f.Model.Coefs()
	var v, q float64
	for a := 0; a < p; a++ {
		v += f.Coef[a] * x[a]
		for b := 0; b < p; b++ {
			q += x[a] * f.Cov[a][b] * x[b]
		}
	}
	return v, f.TCrit * math.Sqrt(f.ResidSD*f.ResidSD+max(q, 0))
}

// CrossKind says whether and when a fitted trend reaches a limit.
type CrossKind uint8

const (
	// CrossUnknown is the zero CrossKind.
	CrossUnknown CrossKind = iota
	// CrossAhead: the trend reaches the limit within the horizon.
	CrossAhead
	// CrossNever: the trend does not reach the limit within the horizon.
	CrossNever
	// CrossPast: the fitted value now is already at or beyond the limit.
	CrossPast
)

func (k CrossKind) String() string {
	switch k {
	case CrossAhead:
		return "ahead"
	case CrossNever:
		return "never"
	case CrossPast:
		return "already past"
	}
	return "unknown"
}

// Crossing is the answer of TimeToLimit. Durations count from the fit's
// newest reading (Last).
type Crossing struct {
	Kind CrossKind
	// At is when the fitted trend reaches the limit (CrossAhead only).
	At time.Duration
	// Earliest is when the 95% prediction band first touches the limit:
	// 0 if it already does; EarliestOK is false if it does not within the
	// horizon.
	Earliest   time.Duration
	EarliestOK bool
	// Latest is when the whole band has passed the limit; LatestOK is
	// false if that does not happen within the horizon.
	Latest   time.Duration
	LatestOK bool
}

// TimeToLimit returns when a Line or Parabola trend reaches limit: from
// below for an upper limit (upper true), from above for a lower one, looking
// no further ahead than horizon. The interval comes from the 95% prediction
// band (see Prediction): when a single reading, noise included, may be
// found beyond the limit, the as-found estimate. For when the mean itself
// gets there (a due date), see MeanTimeToLimit.
func (f *Fit) TimeToLimit(limit float64, upper bool, horizon time.Duration) (Crossing, error) {
	if f.Model != Line && f.Model != Parabola {
		return Crossing{}, ErrModel
	}
	if !f.OK() {
		return Crossing{}, f.Err
	}
	// Work on m(τ) = s·trend(τ) against Λ = s·limit, so both directions
	// read "m rises to Λ".
	s := 1.0
	if !upper {
		s = -1
	}
	lam := s * limit
	hdays := float64(horizon) / nanosPerDay
	dur := func(days float64) time.Duration { return time.Duration(days * nanosPerDay) }
	var c Crossing

	a, b, c0 := s*f.Coef[2], s*f.Coef[1], s*f.Coef[0]-lam
	if f.Model == Line {
		a = 0
	}
	if c0 >= 0 {
		c.Kind = CrossPast
	} else if tau, ok := firstPositiveRoot(a, b, c0); ok && tau <= hdays {
		c.Kind, c.At = CrossAhead, dur(tau)
	} else {
		c.Kind = CrossNever
	}

	near := func(tau float64) float64 { v, h := f.band(tau); return s*v + h - lam }
	far := func(tau float64) float64 { v, h := f.band(tau); return s*v - h - lam }
	if tau, ok := firstReach(near, hdays); ok {
		c.Earliest, c.EarliestOK = dur(tau), true
	}
	if tau, ok := firstReach(far, hdays); ok {
		c.Latest, c.LatestOK = dur(tau), true
	}
	return c, nil
}

// firstPositiveRoot returns the smallest τ > 0 with a·τ² + b·τ + c = 0,
// given c < 0, using the cancellation-free form of the quadratic formula
// (Press et al., Numerical Recipes, 3rd ed., §5.6).
func firstPositiveRoot(a, b, c float64) (float64, bool) {
	if a == 0 {
		if b > 0 {
			return -c / b, true
		}
		return 0, false
	}
	disc := b*b - 4*a*c
	if disc < 0 {
		return 0, false
	}
	q := -(b + math.Copysign(math.Sqrt(disc), b)) / 2
	best, ok := math.Inf(1), false
	for _, r := range [2]float64{q / a, c / q} {
		if r > 0 && r < best && !math.IsInf(r, 0) && !math.IsNaN(r) {
			best, ok = r, true
		}
	}
	return best, ok
}

// firstReach returns the first τ in [0, h] with g(τ) ≥ 0, found by a scan
// of reachSteps steps then bisection to a relative width of about 1e-12.
func firstReach(g func(float64) float64, h float64) (float64, bool) {
	const reachSteps = 256
	if g(0) >= 0 {
		return 0, true
	}
	lo := 0.0
	for i := 1; i <= reachSteps; i++ {
		hi := h * float64(i) / reachSteps
		if g(hi) >= 0 {
			for range 60 {
				mid := (lo + hi) / 2
				if g(mid) >= 0 {
					hi = mid
				} else {
					lo = mid
				}
			}
			return hi, true
		}
		lo = hi
	}
	return 0, false
}

// Doubling returns, for an Exp fit, the doubling time ln 2/c1 in days
// (negative: a halving time) and its 95% interval from the interval of
// c1. bounded is false when that interval contains zero growth: the data
// do not tell growth from decay and the interval is unbounded.
func (f *Fit) Doubling() (days, low, high float64, bounded bool, err error) {
	if f.Model != Exp {
		return 0, 0, 0, false, ErrModel
	}
	if !f.OK() {
		return 0, 0, 0, false, f.Err
	}
	if f.Coef[1] == 0 {
		return 0, 0, 0, false, nil
	}
	days = math.Ln2 / f.Coef[1]
	lo, hi := f.CI[1][0], f.CI[1][1]
	if lo <= 0 && hi >= 0 {
		return days, 0, 0, false, nil
	}
	return days, math.Ln2 / hi, math.Ln2 / lo, true, nil
}
