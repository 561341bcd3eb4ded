package alert

import (
	"math"
	"sync"
	"time"

	"gonum.org/v1/gonum/stat/distuv"
)

// Budget is the false-alarm budget of a sensor: how many alerts raised
// by noise alone, with no drift, a year of evaluations may produce. The
// gates of every limit kind and window share it.
//
// # Derivation
//
// A window with pane P is judged E = (1 year)/P times a year (a year of
// 365.2425 days: the 1d/1h window 8,766 times, the 30d/1d one 365). A
// rule with K limit kinds set and W windows makes E·K evaluations a year
// on each window, and by Bonferroni's inequality the expected false
// raises a year stay within the budget B when each (window, kind) may
// raise with probability at most
//
//	α = B / (E · K · W)
//
// per evaluation. Kinds that open tickets share FalseTicketsPerYear (K
// counting those kinds only); every limit kind, and the step detector
// when on (see Tracker.StepSettings), shares AlertsPerYear; a kind under
// both takes the smaller α.
//
// Debounce d turns α into a gate: a raise needs d consecutive breaching
// evaluations that no other raise uses, so raises per evaluation are at
// most (breaches per evaluation)/d, however strongly consecutive windows
// are correlated. The gate may therefore breach with probability
// p = d·α per evaluation. It is not α^(1/d): that would hold for
// independent evaluations, but a sliding window shares all panes but one
// with the previous evaluation, so breaches come in runs and the
// d-in-a-row probability is close to p itself.
//
// The gate turns p into a multiple q of the coefficient's standard error
// (seFor) that the estimate must exceed: q = t⁻¹(1 − p/2) of Student's t
// with the fit's degrees of freedom for a magnitude (slope, curvature),
// t⁻¹(1 − p) for growth (doubling), and Scheffé's
// q = √(P·F⁻¹(1 − p; P, df)) for lead time, whose band is judged at every
// τ at once (P coefficients; Scheffé 1953). Never below the fit's own
// 97.5% t, so a breach still needs the 95% interval beyond the limit.
//
// With the defaults (0.01 a year, both budgets equal) and a rule of four
// limit kinds on windows 1d/1h and 30d/1d with debounce 3: on the 1-day
// window α = 0.01/(8,766·4·2) = 1.4e-7, p = 4.3e-7, q = 7.07 for a slope
// at 22 degrees of freedom (Scheffé 7.84 for a line's lead time); on the
// 30-day window α = 3.4e-6, p = 1.0e-5, q = 5.36 at 28 (Scheffé 5.97).
// The 1-day window was judged 8,766 times a year against a floor of
// 2t = 4.15 before, which promised up to 1.8e-4 slope raises an
// evaluation: 1.6 false slope alerts a sensor-year on that window
// alone. A short window now raises only on drift many standard errors
// strong: that is the price of few false tickets.
type Budget struct {
	// FalseTicketsPerYear is the accepted rate of recalibration tickets
	// opened by noise alone, per sensor-year. Zero means 0.01 (one in a
	// hundred sensor-years: our choice, a large fleet then sees a false
	// ticket every few days rather than hundreds). > 0.
	FalseTicketsPerYear float64
	// AlertsPerYear is the accepted rate of alerts of any limit kind
	// raised by noise alone, per sensor-year. Zero means
	// FalseTicketsPerYear. > 0.
	AlertsPerYear float64
}

// DefaultFalseTicketsPerYear is the default Budget.FalseTicketsPerYear.
const DefaultFalseTicketsPerYear = 0.01

// year is the mean Gregorian year, the year of the budget.
const year = time.Duration(365.2425 * float64(day))

func (b Budget) resolve() Budget {
	if b.FalseTicketsPerYear == 0 {
		b.FalseTicketsPerYear = DefaultFalseTicketsPerYear
	}
	if b.AlertsPerYear == 0 {
		b.AlertsPerYear = b.FalseTicketsPerYear
	}
	return b
}

func (b Budget) check(bad func(string, any, string)) {
	if !(b.FalseTicketsPerYear > 0) || !finite(b.FalseTicketsPerYear) {
		bad("Budget.FalseTicketsPerYear", b.FalseTicketsPerYear, "must be finite and > 0")
	}
	if !(b.AlertsPerYear > 0) || !finite(b.AlertsPerYear) {
		bad("Budget.AlertsPerYear", b.AlertsPerYear, "must be finite and > 0")
	}
}

// EvaluationsPerYear returns how many times a year a window of pane
// width pane is judged: one evaluation per pane close.
func EvaluationsPerYear(pane time.Duration) float64 { return float64(year) / float64(pane) }

// alphas returns, per window and kind, the per-evaluation false-raise
// probability α the budget grants (0 for kinds not set or not fitted).
func (r *Rule) alphas() [][]float64 {
	var all, tickets int
	for _, k := range Kinds() {
		if k.FitKind() && r.on(k) {
			all++
			if r.opensTicket(k) {
				tickets++
			}
		}
	}
	if r.on(Step) {
		all++ // the step detector takes a share of the alert budget
	}
	out := make([][]float64, len(r.Windows))
	w := float64(len(r.Windows))
	for i, spec := range r.Windows {
		out[i] = make([]float64, len(kindTable))
		e := EvaluationsPerYear(spec.Pane)
		for _, k := range Kinds() {
			if !k.FitKind() || !r.on(k) {
				continue
			}
			a := r.Budget.AlertsPerYear / (e * float64(all) * w)
			if r.opensTicket(k) {
				a = min(a, r.Budget.FalseTicketsPerYear/(e*float64(tickets)*w))
			}
			out[i][k] = a
		}
	}
	return out
}

// StepSettings returns the step detector settings of window w (an
// index into the rule's windows) with H filled in from the budget when
// the rule leaves it zero: the step detector takes one share of
// AlertsPerYear like a limit kind, α = A/(E·K·W) per update, updated
// once per pane close of the window (feed it the pane mean), so its
// in-control average run length must be at least 1/α updates and H is
// StepH(K, 1/α). With the default budget, a rule of slope and step on
// windows 1d/1h and 30d/1d: α = 0.01/(8,766·2·2) = 2.9e-7 an hourly
// update, H = 13.9 (K 0.5), which still finds a 2σ step in 10 updates
// on average (CUSUMARL at the shift; a 1σ step takes 28). ok is false when the rule has
// no step detector or w is out of range.
func (t *Tracker) StepSettings(w int) (s StepSettings, ok bool) {
	r := &t.rule
	if w < 0 || w >= len(r.Windows) || !r.on(Step) {
		return StepSettings{}, false
	}
	s = r.Detect.Step
	if s.H == 0 {
		var all int
		for _, k := range Kinds() {
			if (k.FitKind() || k == Step) && r.on(k) {
				all++
			}
		}
		a := r.Budget.AlertsPerYear / (EvaluationsPerYear(r.Windows[w].Pane) * float64(all) * float64(len(r.Windows)))
		s.H = StepH(s.K, 1/a)
	}
	return s, true
}

// Alpha returns the per-evaluation false-raise probability the rule's
// budget grants kind k on window w (see Budget), and false for a window
// not in the rule or a kind not set or not judged on fits.
func (t *Tracker) Alpha(w int, k Kind) (float64, bool) {
	if w < 0 || w >= len(t.alpha) || !k.valid() || t.alpha[w][k] == 0 {
		return 0, false
	}
	return t.alpha[w][k], true
}

// gateMultiple returns the multiple of the standard error an estimate
// must exceed to breach, for a breach probability p per evaluation: the
// (1 − p/tails) quantile of Student's t with df degrees of freedom,
// and never below tcrit (the fit's 97.5% quantile).
func gateMultiple(p float64, tails, df int, tcrit float64) float64 {
	if df < 1 || !(p > 0) {
		return math.Inf(1)
	}
	k := quantileKey{p: p, shape: tails, df: df}
	q, ok := quantiles.Load(k)
	if !ok {
		q, _ = quantiles.LoadOrStore(k, distuv.StudentsT{Mu: 0, Sigma: 1, Nu: float64(df)}.Quantile(1-p/float64(tails)))
	}
	return max(q.(float64), tcrit)
}

// schefféMultiple returns √(P·F⁻¹(1 − p; P, df)), the multiple of the
// fitted mean's standard error that bounds the whole band of a P
// coefficient fit at once with probability 1 − p (Scheffé 1953), never
// below tcrit.
func schefféMultiple(p float64, coefs, df int, tcrit float64) float64 {
	if df < 1 || !(p > 0) {
		return math.Inf(1)
	}
	k := quantileKey{p: p, shape: -coefs, df: df}
	q, ok := quantiles.Load(k)
	if !ok {
		f := distuv.F{D1: float64(coefs), D2: float64(df)}.Quantile(1 - p)
		q, _ = quantiles.LoadOrStore(k, math.Sqrt(float64(coefs)*f))
	}
	return max(q.(float64), tcrit)
}

// quantiles memoizes the gate multiples by (p, shape, df), shape the
// tails of a t quantile or minus the coefficients of a Scheffé multiple.
// A quantile at p near 1e-7 costs tens of microseconds (gonum inverts the
// incomplete beta function), and without the memo an evaluation spent
// 87% of its time there (CPU profile of TestFalseAlarms_PureNoise); a
// rule's p is fixed per (window, kind) and df takes few values, so the
// memo stays small. The values depend on their key alone, so sharing
// them between trackers and goroutines changes no result.
var quantiles sync.Map // quantileKey → float64

type quantileKey struct {
	p     float64
	shape int
	df    int
}
