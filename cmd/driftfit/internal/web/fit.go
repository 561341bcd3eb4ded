package web

import (
	"fmt"
	"math"
	"slices"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/report"
	"driftfit/rolling"
)

const day = 24 * time.Hour

// days converts a duration to days, the unit of τ in every fit.
func days(d time.Duration) float64 { return d.Seconds() / 86400 }

// band returns the fitted value of f at τ days from f.Last with its 95%
// confidence band of the mean: ŷ(τ) ± t·√(xᵀ·Cov·x), x = (1, τ, τ²)
// (Draper and Smith, Applied Regression Analysis, 3rd ed., section 5.3).
// For Exp the band is taken on ln y and exponentiated, so it is of y.
func band(f *rolling.Fit, tau float64) (y, lo, hi float64) {
	p := f.Model.Coefs()
	x := [3]float64{1, tau, tau * tau}
	var v float64
	for i := range p {
		y += f.Coef[i] * x[i]
		for j := range p {
			v += x[i] * f.Cov[i][j] * x[j]
		}
	}
	h := f.TCrit * math.Sqrt(max(v, 0))
	lo, hi = y-h, y+h
	if f.Model == rolling.Exp {
		return math.Exp(y), math.Exp(lo), math.Exp(hi)
	}
	return y, lo, hi
}

// fitStatus names a fit's error as replay and history print it.
func fitStatus(f *rolling.Fit) string { return report.Status(f.Err) }

// judgedModel is the model the rule's limits are judged on, for the
// chart: the trend model when lead time is limited, else the model of
// the first limit set in the order slope (line), curvature (parabola),
// doubling (exp); the trend model when none is.
func judgedModel(r *alert.Rule) rolling.Model {
	trend := r.TrendModel
	if trend == rolling.ModelUnknown {
		trend = rolling.Line
	}
	switch {
	case r.Limits.LeadTime.On():
		return trend
	case r.Limits.Slope.On():
		return rolling.Line
	case r.Limits.Curvature.On():
		return rolling.Parabola
	case r.Limits.Doubling.On():
		return rolling.Exp
	}
	return trend
}

func trendModel(r *alert.Rule) rolling.Model {
	if r.TrendModel == rolling.Parabola {
		return rolling.Parabola
	}
	return rolling.Line
}

// judge says whether the alert rules judge this solution, and if not,
// why. The gates restate alert.Tracker.Evaluate's (see alert.Rule for
// the defaults of zero fields): a window in the rule, MinReadings
// readings, MinCoverage of its panes filled, and a fit that is usable,
// positive definite, has MinReadings readings and a condition number at
// most MaxCond.
func judge(r *alert.Rule, sol *rolling.Solution, m rolling.Model) (bool, string) {
	if !slices.Contains(r.Windows, sol.Window) {
		return false, "window not in the rule"
	}
	minN := r.MinReadings
	if minN == 0 {
		minN = defaultMinReadings
	}
	maxCond := r.MaxCond
	if maxCond == 0 {
		maxCond = defaultMaxCond
	}
	if sol.N < minN {
		return false, fmt.Sprintf("too few readings %d < %d", sol.N, minN)
	}
	if c := sol.Coverage(); c < r.MinCoverage {
		return false, fmt.Sprintf("coverage %.2f < %.2f", c, r.MinCoverage)
	}
	f := sol.Fit(m)
	switch {
	case !f.OK():
		return false, "fit not usable: " + fitStatus(f)
	case !f.PosDef:
		return false, "fit not positive definite"
	case f.N < minN:
		return false, fmt.Sprintf("too few readings in the %s fit %d < %d", m, f.N, minN)
	case f.Cond > maxCond:
		return false, fmt.Sprintf("condition number %.3g > %.3g", f.Cond, maxCond)
	}
	return true, ""
}

// horizon is how far ahead the trend is followed for exits, as
// alert.Rule.Horizon defines its zero value.
func horizon(r *alert.Rule) time.Duration {
	if r.Horizon > 0 {
		return r.Horizon
	}
	if lt := max(r.Limits.LeadTime.Warning, r.Limits.LeadTime.Critical); lt > 0 {
		return 4 * lt
	}
	return defaultHorizon
}

// Exit is when a trend fit leaves the tolerance band.
type Exit struct {
	// Kind is "ahead" or "already past".
	Kind string `json:"kind"`
	// Edge is "upper" or "lower".
	Edge string `json:"edge"`
	// At is when the fitted trend reaches the edge (the fit's newest
	// reading when already past).
	At time.Time `json:"at"`
	// Earliest is when the 95% prediction band first touches the edge;
	// absent when it does not within the horizon.
	Earliest *time.Time `json:"earliest,omitempty"`
}

// exitOf returns the sooner exit of f from [asLeft − tol, asLeft + tol]
// within h, or nil when the trend stays inside. f is a Line or Parabola.
func exitOf(f *rolling.Fit, asLeft, tol float64, h time.Duration) *Exit {
	var best *Exit
	for _, upper := range []bool{true, false} {
		lim, edge := asLeft+tol, "upper"
		if !upper {
			lim, edge = asLeft-tol, "lower"
		}
		c, err := f.TimeToLimit(lim, upper, h)
		if err != nil {
			continue
		}
		var e *Exit
		switch c.Kind {
		case rolling.CrossPast:
			e = &Exit{Kind: "already past", Edge: edge, At: f.Last}
		case rolling.CrossAhead:
			e = &Exit{Kind: "ahead", Edge: edge, At: f.Last.Add(c.At)}
		default:
			continue
		}
		if c.EarliestOK {
			t := f.Last.Add(c.Earliest)
			e.Earliest = &t
		}
		if best == nil || e.At.Before(best.At) {
			best = e
		}
	}
	return best
}
