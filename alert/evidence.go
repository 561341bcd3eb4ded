package alert

import (
	"math"
	"time"

	"driftfit/rolling"
)

// evidence is what one evaluation of one limit found.
type evidence struct {
	// valid: the gates passed and at least one level of the limit was
	// testable on this window. An invalid evaluation is no evidence
	// either way.
	valid bool
	sev   Severity // highest level breached; SeverityUnknown for none
	clear bool     // the clear statistic is below ClearFraction × lowest level

	fit    *rolling.Fit
	value  float64    // the fitted quantity, in report units
	ci     [2]float64 // its 95% interval
	limit  float64    // the breached level, or the lowest level; report units
	beyond bool       // lead time only: no crossing within the horizon
}

type level struct {
	sev Severity
	v   float64
}

// rateLevels returns the set levels of l, least severe first.
func rateLevels(l RateLimit) []level {
	var out []level
	if l.Warning > 0 {
		out = append(out, level{Warning, l.Warning})
	}
	if l.Critical > 0 {
		out = append(out, level{Critical, l.Critical})
	}
	return out
}

// durationLevels returns the set levels of l in days, least severe (the
// longest) first.
func durationLevels(l DurationLimit) []level {
	var out []level
	if l.Warning > 0 {
		out = append(out, level{Warning, days(l.Warning)})
	}
	if l.Critical > 0 {
		out = append(out, level{Critical, days(l.Critical)})
	}
	return out
}

func days(d time.Duration) float64 { return float64(d) / float64(day) }

// usable reports whether a fit passes the fit-level gates: no error (or
// only ErrConstant), a positive definite normal matrix, enough readings,
// a condition number within MaxCond, and finite numbers.
func (r *Rule) usable(f *rolling.Fit) bool {
	if !f.OK() || !f.PosDef || f.N < r.MinReadings || !(f.Cond <= r.MaxCond) {
		return false
	}
	for i := range f.Model.Coefs() {
		if !finite(f.Coef[i]) || !finite(f.SE[i]) || !finite(f.CI[i][0]) || !finite(f.CI[i][1]) {
			return false
		}
	}
	return finite(f.ResidSD) && finite(f.TCrit)
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// rateEvidence judges coefficient i of f against a rate limit, with a
// breach probability p per evaluation granted by the budget (tails 2 for
// a magnitude).
//
// Breach statistic: the bound of the 95% confidence interval nearest to
// zero, b = max(low, −high, 0), the interval c ± t·SE with SE from
// seFor. A level L is breached when b > L, so the data show, at the
// 97.5% one-sided level, a rate beyond L in one direction, and also
// |c| > q·SE with q = gateMultiple(p): the significance floor. Without
// it, a window too short to resolve L (t·SE much larger than L) breaches
// on 2.5% of pure-noise evaluations per direction; with it, a breach
// under no drift has probability p whatever L and the window (see
// Budget).
//
// Clear statistic: the point estimate |c|, cleared below
// ClearFraction × the lowest level.
func rateEvidence(f *rolling.Fit, i int, l RateLimit, frac float64, tails int, p float64) evidence {
	se, ok := seFor(f, i)
	if !ok {
		return evidence{}
	}
	c := f.Coef[i]
	half := tFor(f) * se
	lo, hi := c-half, c+half
	floor := gateMultiple(p, tails, dfFor(f), tFor(f)) * se
	b := max(lo, -hi, 0)
	ev := evidence{valid: true, fit: f, value: c, ci: [2]float64{lo, hi}, limit: l.lowest()}
	for _, lv := range rateLevels(l) {
		if b > lv.v && math.Abs(c) > floor {
			ev.sev, ev.limit = lv.sev, lv.v
		}
	}
	ev.clear = math.Abs(c) < frac*l.lowest()
	return ev
}

// doublingEvidence judges the exp fit's growth rate c1 (per day) against
// a doubling-time limit, as a rate limit of ln 2 / (level in days) on
// growth only: breached when the lower 95% bound of c1 exceeds it and c1
// exceeds the one-sided significance floor q·SE (see rateEvidence),
// cleared when c1 drops below ClearFraction × ln 2 / (lowest level), the
// lowest level being the longest time. Reported in 1/d; the doubling time
// is ln 2 / value.
func doublingEvidence(f *rolling.Fit, l DurationLimit, frac float64, p float64) evidence {
	se, ok := seFor(f, 1)
	if !ok {
		return evidence{}
	}
	c := f.Coef[1]
	half := tFor(f) * se
	lo, hi := c-half, c+half
	floor := gateMultiple(p, 1, dfFor(f), tFor(f)) * se
	lowest := math.Ln2 / days(l.lowest())
	ev := evidence{valid: true, fit: f, value: c, ci: [2]float64{lo, hi}, limit: lowest}
	for _, lv := range durationLevels(l) {
		if r := math.Ln2 / lv.v; lo > r && c > floor {
			ev.sev, ev.limit = lv.sev, r
		}
	}
	ev.clear = c < frac*lowest
	return ev
}

// leadEvidence judges the trend fit f against the lead-time limit, with
// the tolerance band [asLeft − tol, asLeft + tol]. The crossing times,
// which cost two TimeToLimit calls, are computed only when needed: when
// a level is breached or the alert is firing (needCross).
//
// Breach statistic: a level of L days is breached when, at some τ in
// [0, L] (sampled at leadSteps+1 points), the 95% confidence bound of the
// fitted trend's mean nearest to the as-left value lies outside the band,
// and the fitted mean lies at least q standard errors of the mean from
// the as-left value, q the Scheffé multiple for breach probability p
// (the significance floor; see Budget): the data show, at the 97.5%
// one-sided level, that the sensor's mean leaves tolerance within L.
// This uses the confidence band of the mean, not the prediction band of
// single readings: the prediction band's earliest touch of the band edge
// (rolling.Crossing.Earliest) is reported in the event, and is always
// sooner, but on pure noise a short window's prediction band reaches any
// tolerance within days, so its touch is no evidence of drift.
//
// Clear statistic: the fitted trend's own crossing time (At), cleared
// when it lies beyond the lowest level (the longest time) divided by
// ClearFraction, or does not happen within the horizon.
func (r *Rule) leadEvidence(f *rolling.Fit, asLeft float64, needCross bool, p float64) evidence {
	const leadSteps = 64
	l := r.Limits.LeadTime
	ev := evidence{valid: true, fit: f, limit: days(l.lowest())}
	// One grid over [0, longest level]: the first breaching τ decides
	// which levels it lies within.
	longest := days(max(l.Warning, l.Critical))
	b := newBand(f)
	scale, ok := covScale(f)
	if !ok {
		return evidence{}
	}
	q := schefféMultiple(p, f.Model.Coefs(), dfFor(f), tFor(f))
	for k := 0; k <= leadSteps; k++ {
		tau := longest * float64(k) / leadSteps
		m, h := b.at(tau)
		h *= scale
		dist := math.Abs(m - asLeft)
		dev := dist - h // bound nearest the as-left value
		if dev >= r.Tolerance && dist >= q*h/tFor(f) {
			for _, lv := range durationLevels(l) {
				if tau <= lv.v {
					ev.sev, ev.limit = lv.sev, lv.v
				}
			}
			break
		}
	}
	if ev.sev == SeverityUnknown && !needCross {
		return ev
	}
	cr, upper, ok := r.crossing(f, asLeft)
	if !ok {
		return evidence{}
	}
	hd := days(r.Horizon)
	ev.value, ev.ci = hd, [2]float64{hd, hd}
	switch cr.Kind {
	case rolling.CrossPast:
		ev.value = 0
	case rolling.CrossAhead:
		ev.value = days(cr.At)
	default:
		ev.beyond = true
	}
	// The interval of the exit time from the gate's own band: the near
	// edge of the mean's band reaching the tolerance edge, and the far
	// edge (the whole band out, what the gate compares with the level).
	edge, sgn := asLeft-r.Tolerance, -1.0
	if upper {
		edge, sgn = asLeft+r.Tolerance, 1
	}
	out := func(far float64) func(float64) float64 {
		return func(tau float64) float64 {
			m, h := b.at(tau)
			return sgn*(m-edge) - far*h*scale
		}
	}
	if tau, ok := firstNonNegative(out(-1), hd); ok {
		ev.ci[0] = tau
	}
	if tau, ok := firstNonNegative(out(1), hd); ok {
		ev.ci[1] = tau
	}
	ev.clear = cr.Kind == rolling.CrossNever ||
		(cr.Kind == rolling.CrossAhead && float64(cr.At) > float64(l.lowest())/r.ClearFraction)
	return ev
}

// firstNonNegative returns the first τ in [0, h] with g(τ) ≥ 0, to a
// millionth of h: a scan of 256 steps, then bisection of the step where
// g changes sign. False when g stays negative at every step.
func firstNonNegative(g func(float64) float64, h float64) (float64, bool) {
	const steps = 256
	if g(0) >= 0 {
		return 0, true
	}
	prev := 0.0
	for k := 1; k <= steps; k++ {
		tau := h * float64(k) / steps
		if g(tau) < 0 {
			prev = tau
			continue
		}
		lo, hi := prev, tau
		for hi-lo > h*1e-6 {
			if mid := (lo + hi) / 2; g(mid) >= 0 {
				hi = mid
			} else {
				lo = mid
			}
		}
		return hi, true
	}
	return 0, false
}

// band is the fitted trend m(τ) and the variance of its mean,
// xᵀ·Cov·x with x = (1, τ, τ²), as polynomials in τ days after the
// newest reading.
type band struct {
	m [3]float64
	q [5]float64
	t float64
}

func newBand(f *rolling.Fit) band {
	b := band{t: tFor(f)}
	p := f.Model.Coefs()
	for a := range p {
		b.m[a] = f.Coef[a]
		for c := range p {
			b.q[a+c] += f.Cov[a][c]
		}
	}
	return b
}

// at returns the fitted value τ days after the newest reading and the
// half-width of the 95% confidence interval of that mean value.
func (b *band) at(tau float64) (value, half float64) {
	v := b.m[0] + tau*(b.m[1]+tau*b.m[2])
	q := b.q[0] + tau*(b.q[1]+tau*(b.q[2]+tau*(b.q[3]+tau*b.q[4])))
	return v, b.t * math.Sqrt(max(q, 0))
}

// crossing returns when the trend f leaves the tolerance band, from the
// edge it reaches first: already past, else the soonest crossing of the
// fitted trend, else the soonest touch of the prediction band. upper
// says which edge. ok is false when TimeToLimit refused the fit.
func (r *Rule) crossing(f *rolling.Fit, asLeft float64) (cr rolling.Crossing, upper, ok bool) {
	cu, err := f.TimeToLimit(asLeft+r.Tolerance, true, r.Horizon)
	if err != nil {
		return cr, false, false
	}
	cd, err := f.TimeToLimit(asLeft-r.Tolerance, false, r.Horizon)
	if err != nil {
		return cr, false, false
	}
	if sooner(cd, cu) {
		return cd, false, true
	}
	return cu, true, true
}

// meanExit returns when the fitted mean of trend f reaches the edge of
// the tolerance band it heads for (rolling.Fit.MeanTimeToLimit), on the
// serially corrected covariance, as seFor judges: the plain one for a fit
// that carries no serial information (Pairs 0). The edge is the one the
// mean is past, else the one with the sooner lower bound, else the one
// the fitted mean reaches, else the one the slope points to. upper says
// which; ok is false when MeanTimeToLimit refused the fit.
func (r *Rule) meanExit(f *rolling.Fit, asLeft float64) (mc rolling.MeanCross, upper, ok bool) {
	corrected := f.Pairs > 0
	mu, err := f.MeanTimeToLimit(asLeft+r.Tolerance, true, corrected, r.Horizon)
	if err != nil {
		return mc, false, false
	}
	md, err := f.MeanTimeToLimit(asLeft-r.Tolerance, false, corrected, r.Horizon)
	if err != nil {
		return mc, false, false
	}
	rank := func(c rolling.MeanCross) (int, float64) {
		switch {
		case c.Kind == rolling.CrossPast:
			return 0, 0
		case c.LowerOK:
			return 1, c.LowerDays
		case c.Kind == rolling.CrossAhead:
			return 2, c.Days
		}
		return 3, 0
	}
	ru, du := rank(mu)
	rd, dd := rank(md)
	if rd < ru || (rd == ru && (dd < du || (dd == du && f.Coef[1] < 0))) {
		return md, false, true
	}
	return mu, true, true
}

// recentOf returns the lines over the newest half and quarter of sol's
// window (rolling.Solution.Recent) for a line trend to check its due
// date against (recentBound); nil where the trend is not a line or the
// part is not usable.
func (r *Rule) recentOf(sol *rolling.Solution, trend *rolling.Fit) [2]*rolling.Fit {
	var out [2]*rolling.Fit
	for k := range sol.Recent {
		if f := &sol.Recent[k]; trend.Model == rolling.Line && f.Model == rolling.Line && r.usable(f) {
			out[k] = f
		}
	}
	return out
}

// recentBound returns the earliest one-sided 95% lower confidence bound,
// in days from the last reading, of the time the mean of a line over the
// newest part of the window (hs: half and quarter) reaches the edge the
// window's line heads for (upper or lower of asLeft ± Tolerance), each
// with its serially corrected covariance when it carries one; false when
// none gives one (nil, its rate towards the edge not significant, or no
// bound within the horizon). The due date takes the earlier of this and
// the whole window's bound. A line fitted over a window in which a drift
// began part-way (flat, then a ramp) underestimates the rate and the
// level at its end, so its exit bound comes late: in
// TestDetection_PlantNoise (drift of three times the slope warning level
// from day 40, white hourly noise) the window's bound less the margin fell
// after the true exit for 97 of 100 tickets as opened, the earlier of it
// and the newest half's for 3. Testing first whether the half runs faster
// (the difference of the rates against √(Var b_half − Var b_window),
// Hausman 1978) kept 63 late: a month of readings cannot tell a bend that
// soon. The quarter serves long windows, whose newest half may still hold
// the flat part (a 180-day window: 83 of 100 late with the half alone, at
// three times the level in AR(1) 0.9 hourly noise); over a short part
// the rate is seldom significant unless the drift is fast, so it rarely
// moves a slow drift's date. The cost is an earlier date where the drift
// is a straight line; the measured slack is in DEVELOPERS.md.
func (r *Rule) recentBound(hs [2]*rolling.Fit, asLeft float64, upper bool) (float64, bool) {
	limit := asLeft - r.Tolerance
	if upper {
		limit = asLeft + r.Tolerance
	}
	best, ok := 0.0, false
	for _, h := range hs {
		if h == nil {
			continue
		}
		mc, err := h.MeanTimeToLimit(limit, upper, h.Pairs > 0, r.Horizon)
		if err == nil && mc.LowerOK && (!ok || mc.LowerDays < best) {
			best, ok = mc.LowerDays, true
		}
	}
	return best, ok
}

// sooner reports whether crossing a comes strictly before b.
func sooner(a, b rolling.Crossing) bool {
	rank := func(c rolling.Crossing) int {
		switch c.Kind {
		case rolling.CrossPast:
			return 0
		case rolling.CrossAhead:
			return 1
		}
		return 2
	}
	if ra, rb := rank(a), rank(b); ra != rb {
		return ra < rb
	}
	if a.Kind == rolling.CrossAhead && a.At != b.At {
		return a.At < b.At
	}
	if a.EarliestOK != b.EarliestOK {
		return a.EarliestOK
	}
	return a.Earliest < b.Earliest
}
