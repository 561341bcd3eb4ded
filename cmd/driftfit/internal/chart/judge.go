package chart

import (
	"errors"

	"driftfit/alert"
	"driftfit/rolling"
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
