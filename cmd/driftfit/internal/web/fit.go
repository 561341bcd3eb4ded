package web

import (
	"math"
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
// (Draper and Smith, Applied Regression Analysis, 3rd ed., section 5.3),
// on the serially corrected covariance, Inflation²·Cov with t of the
// effective degrees of freedom, when f carries the correction (as the
// gates judge it; see withSerial), else the plain one.
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
	t := f.TCrit
	if f.Pairs > 0 && f.SerialErr == nil {
		t, v = f.TCritAdj, v*f.Inflation*f.Inflation
	}
	h := t * math.Sqrt(max(v, 0))
	lo, hi = y-h, y+h
	if f.Model == rolling.Exp {
		return math.Exp(y), math.Exp(lo), math.Exp(hi)
	}
	return y, lo, hi
}

// fitStatus names a fit's error as replay and history print it.
func fitStatus(f *rolling.Fit) string { return report.Status(f.Err) }

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

// withSerial returns sol with the serial correction the service judges
// it with (rolling.Sensor.SolveJudged): its own, or, when its readings
// are too few to estimate one, s, the estimate of the sensor's windows
// (alert.SerialOf).
func withSerial(sol rolling.Solution, s alert.Serial) rolling.Solution {
	if sol.Parabola.Pairs >= rolling.MinPairs || s.Pairs == 0 {
		return sol
	}
	return sol.WithSerial(s.R1, s.Pairs)
}

// serialOf returns the serial estimate the sensor's windows give the
// service's tracker (alert.SerialOf) from recs, the newest fit record of
// each window, taken in window order so that a tie between windows
// always resolves the same way.
func serialOf(recs map[rolling.WindowSpec]rolling.Solution) alert.Serial {
	sols := make([]*rolling.Solution, 0, len(recs))
	for _, w := range sortedWindows(recs) {
		s := recs[w]
		sols = append(sols, &s)
	}
	return alert.SerialOf(sols...)
}
