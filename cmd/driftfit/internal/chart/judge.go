package chart

import (
	"errors"
	"fmt"
	"slices"

	"driftfit/alert"
	"driftfit/rolling"
)

// Defaults of alert.Rule's zero fields, as documented there; a rule from
// the configuration has them set already, a hand-made one may not.
const (
	DefaultMinReadings = 30
	DefaultMaxCond     = 1e4
)

// JudgedModel is the model the rule's limits are judged on: the trend
// model when lead time is limited, else the model of the first limit set
// in the order slope (line), curvature (parabola), doubling (exp); the
// trend model when none is.
func JudgedModel(r *alert.Rule) rolling.Model {
	trend := TrendModel(r)
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

// TrendModel is the model whose level is compared with the tolerance
// band: the rule's trend model, Line unless it is Parabola.
func TrendModel(r *alert.Rule) rolling.Model {
	if r.TrendModel == rolling.Parabola {
		return rolling.Parabola
	}
	return rolling.Line
}

// Judge says whether the alert rules judge this solution, and if not,
// why. The gates restate alert.Tracker.Evaluate's (see alert.Rule for
// the defaults of zero fields): a window in the rule, MinReadings
// readings, MinCoverage of its panes filled, and a fit that is usable,
// positive definite, has MinReadings readings and a condition number at
// most MaxCond.
func Judge(r *alert.Rule, sol *rolling.Solution, m rolling.Model) (bool, string) {
	if !slices.Contains(r.Windows, sol.Window) {
		return false, "window not in the rule"
	}
	minN := r.MinReadings
	if minN == 0 {
		minN = DefaultMinReadings
	}
	maxCond := r.MaxCond
	if maxCond == 0 {
		maxCond = DefaultMaxCond
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
		return false, "fit not usable: " + Status(f.Err)
	case !f.PosDef:
		return false, "fit not positive definite"
	case f.N < minN:
		return false, fmt.Sprintf("too few readings in the %s fit %d < %d", m, f.N, minN)
	case f.Cond > maxCond:
		return false, fmt.Sprintf("condition number %.3g > %.3g", f.Cond, maxCond)
	}
	return true, ""
}

// Status names the state of a fit in output: "ok" or why there is
// none. The CLI's formats and the pages use these names alike.
func Status(err error) string {
	switch {
	case err == nil:
		return "ok"
	case errors.Is(err, rolling.ErrNotEnoughData):
		return "not_enough_data"
	case errors.Is(err, rolling.ErrNoTimeSpread):
		return "no_time_spread"
	case errors.Is(err, rolling.ErrSingular):
		return "singular"
	case errors.Is(err, rolling.ErrConstant):
		return "constant"
	case errors.Is(err, rolling.ErrNumeric):
		return "out_of_range"
	case errors.Is(err, rolling.ErrUnresolved):
		// The residuals are below their rounding bound: the standard
		// errors are upper bounds (an exact line, or nearly).
		return "unresolved"
	}
	return "error"
}
