package rolling

import (
	"math"
	"time"
)

// MeanCross is the answer of Fit.MeanTimeToLimit: when the fitted mean
// of the model reaches a limit, with confidence bounds from the
// uncertainty of the mean curve alone. Times are τ in days from the
// fit's newest reading (Last), like Coef.
//
// It differs from TimeToLimit (the as-found estimate), whose band is the
// prediction band of single readings: that band adds the scatter of one
// reading, ResidSD, to the uncertainty of the curve, and says when a
// reading may be found beyond the limit. MeanCross says when the sensor's
// mean (its drift without the noise) reaches the limit, the quantity a
// recalibration due date is about, and its band narrows as readings
// accumulate instead of staying at least ±t·ResidSD wide.
type MeanCross struct {
	// Kind is CrossAhead when the fitted mean reaches the limit at
	// Days > 0, CrossPast when it is at or beyond the limit now, CrossNever
	// when it moves away from the limit, is flat, or does not reach it
	// within the horizon.
	Kind CrossKind
	Days float64 // τ* (CrossAhead only)

	// Significant reports whether the rate towards the limit differs
	// from zero at the one-sided 95% level. Without it the band edge
	// reaches the limit only because the band widens with extrapolation,
	// which dates nothing, and no bound is given (Line only; a parabola's
	// bound is given whenever its band reaches the limit).
	Significant bool

	// LowerDays is the one-sided 95% lower confidence bound of the time
	// the mean reaches the limit: the first τ ≥ 0 at which the near edge
	// of the one-sided 95% confidence band of the mean (Student's t at
	// 95% with the fit's degrees of freedom) reaches the limit; 0 when it
	// already does. LowerOK is false when there is none within the
	// horizon, or the rate is not significant (Line).
	LowerDays float64
	LowerOK   bool

	// LowDays and HighDays are Fieller's two-sided 95% confidence
	// interval of τ* = (limit − c0)/c1 for a Line (Fieller 1954, J. R.
	// Stat. Soc. B 16(2), 175–185), which may begin in the past;
	// IntervalOK is false when it is not a bounded interval (c1 not
	// significant at the two-sided 95% level: the confidence set is then
	// unbounded) and for a Parabola.
	LowDays, HighDays float64
	IntervalOK        bool
}

// MeanTimeToLimit returns when the mean of a Line or Parabola trend
// reaches limit, from below for an upper limit (upper true) or from above
// for a lower one, looking no further ahead than horizon for the
// parabola's roots and for LowerDays.
//
// With corrected true it uses the serially corrected covariance,
// Inflation²·Cov, and Student's t with ⌊NEff⌋ − p degrees of freedom
// (see SetSerial), and returns ErrSerialUnknown when the fit carries no
// such correction; with corrected false the plain covariance Cov and DF.
//
// For a Line, with m(τ) = c0 + c1·τ, V(τ) = Var c0 + 2τ·Cov(c0, c1) +
// τ²·Var c1 and t the quantile, the τ with (m(τ) − L)² = t²·V(τ) solve
//
//	(c1² − t²·Var c1)·τ² + 2((c0 − L)·c1 − t²·Cov(c0, c1))·τ + (c0 − L)² − t²·Var c0 = 0,
//
// Fieller's quadratic: a bounded interval when its leading coefficient
// is positive, i.e. c1 is significant at that level. The lower bound is
// its root where the band's near edge meets L, with the one-sided t;
// the interval takes the two-sided t. For a Parabola, V(τ) = xᵀ·Cov·x
// with x = (1, τ, τ²), and the first τ where the near edge
// m(τ) ± t·√V(τ) reaches L is found by a scan and bisection.
func (f *Fit) MeanTimeToLimit(limit float64, upper, corrected bool, horizon time.Duration) (MeanCross, error) {
	if f.Model != Line && f.Model != Parabola {
		return MeanCross{}, ErrModel
	}
	if !f.OK() {
		return MeanCross{}, f.Err
	}
	cov, df := f.Cov, f.DF
	if corrected {
		if f.SerialErr != nil {
			return MeanCross{}, f.SerialErr
		}
		k := f.Inflation * f.Inflation
		for r := range 3 {
			for c := range 3 {
				cov[r][c] *= k
			}
		}
		df = int(f.NEff) - f.Model.Coefs()
	}
	t95 := StudentQuantile(0.95, float64(df))
	t975 := StudentQuantile(0.975, float64(df))
	// s-space: m rises to Λ in both directions.
	s := 1.0
	if !upper {
		s = -1
	}
	b0, b1, b2 := s*f.Coef[0]-s*limit, s*f.Coef[1], s*f.Coef[2]
	if f.Model == Line {
		b2 = 0
	}
	hdays := float64(horizon) / nanosPerDay
	var mc MeanCross
	switch {
	case b0 >= 0:
		mc.Kind = CrossPast
	default:
		if tau, ok := firstPositiveRoot(b2, b1, b0); ok && tau <= hdays {
			mc.Kind, mc.Days = CrossAhead, tau
		} else {
			mc.Kind = CrossNever
		}
	}
	v := func(tau float64) float64 {
		x := [3]float64{1, tau, tau * tau}
		var q float64
		for a := range 3 {
			for b := range 3 {
				q += x[a] * cov[a][b] * x[b]
			}
		}
		return max(q, 0)
	}
	if f.Model == Parabola {
		near := func(tau float64) float64 { return b0 + tau*(b1+tau*b2) + t95*math.Sqrt(v(tau)) }
		mc.Significant = b1*b1 > t95*t95*cov[1][1] && b1 > 0
		if tau, ok := firstReach(near, hdays); ok {
			mc.LowerDays, mc.LowerOK = tau, true
		}
		return mc, nil
	}
	v00, v01, v11 := cov[0][0], cov[0][1], cov[1][1]
	mc.Significant = b1 > 0 && b1*b1 > t95*t95*v11
	if mc.Significant {
		if b0+t95*math.Sqrt(v00) >= 0 {
			mc.LowerDays, mc.LowerOK = 0, true
		} else if lo, _, ok := fieller(b0, b1, v00, v01, v11, t95); ok && lo <= hdays {
			mc.LowerDays, mc.LowerOK = max(lo, 0), true
		}
	}
	if lo, hi, ok := fieller(b0, b1, v00, v01, v11, t975); ok {
		mc.LowDays, mc.HighDays, mc.IntervalOK = lo, hi, true
	}
	return mc, nil
}

// fieller returns the roots lo ≤ hi of Fieller's quadratic for
// τ* = −b0/b1 (the zero of b0 + b1·τ) with variances v00, v11,
// covariance v01 and quantile t, and false unless the leading
// coefficient b1² − t²·v11 is positive (a bounded interval). The roots
// use the cancellation-free form of the quadratic formula (Press et al.,
// Numerical Recipes, 3rd ed., §5.6).
func fieller(b0, b1, v00, v01, v11, t float64) (lo, hi float64, ok bool) {
	t2 := t * t
	a := b1*b1 - t2*v11
	if !(a > 0) {
		return 0, 0, false
	}
	b := b0*b1 - t2*v01 // half the linear coefficient
	c := b0*b0 - t2*v00
	disc := b*b - a*c
	if disc < 0 {
		return 0, 0, false // cannot happen with a > 0 and V positive semi-definite
	}
	q := -(b + math.Copysign(math.Sqrt(disc), b))
	r1, r2 := q/a, c/q
	if q == 0 {
		r1, r2 = 0, 0
	}
	return min(r1, r2), max(r1, r2), true
}
