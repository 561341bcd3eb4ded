package alert

import (
	"errors"
	"fmt"
	"math"
	"time"

	"driftfit/rolling"
)

// Rule holds the alert settings of one sensor, resolved from its class.
// NewTracker fills the zero fields that have a default (stated per field)
// and rejects contradictory ones; a Rule is then read-only.
type Rule struct {
	// Class names the sensor's class in events and tickets; may be empty.
	Class string
	// Unit is the engineering unit of readings, used in reports only.
	Unit string
	// SpanLower and SpanUpper are the calibrated range, reported in
	// tickets. Both zero means not given; otherwise SpanLower < SpanUpper.
	SpanLower, SpanUpper float64
	// Tolerance is the permitted deviation from the as-left value, in
	// Unit; required, > 0.
	Tolerance float64
	// AsLeft is the value the sensor was left at by its last calibration,
	// the centre of the tolerance band; used only if HasAsLeft. Without
	// it, the tracker takes the level c0 of the first trend fit that
	// passes the evidence gates, i.e. it assumes the sensor was within
	// tolerance when monitoring began. That level is kept in the state.
	AsLeft    float64
	HasAsLeft bool

	// Windows are the windows whose solutions are evaluated; required.
	// Each needs Span and Pane > 0 with Span a whole multiple of Pane.
	Windows []rolling.WindowSpec
	// TrendModel predicts when the sensor leaves tolerance: rolling.Line
	// or rolling.Parabola. Zero means rolling.Line.
	TrendModel rolling.Model

	// MinReadings is the least N of a window before it is evaluated,
	// and the least effective count of independent readings of its
	// trend fit (Fit.NEff, when the fit carries the serial correction;
	// see FewEffective). Zero means 30 (the usual rule-of-thumb sample
	// size for normal-theory intervals, common practice). At least 4, so
	// that a parabola keeps one degree of freedom.
	MinReadings int
	// MinCoverage is the least fraction of a window's panes holding
	// readings before it is evaluated, 0..1. Zero means no requirement
	// (DefaultRule sets 0.5).
	MinCoverage float64
	// MaxCond is the largest condition number (Fit.Cond, of the scaled
	// normal matrix) of a fit that is evaluated. Readings spread evenly
	// give about 3 for a line and 20 for a parabola; a larger number
	// means they crowd into a small part of the window, so the
	// coefficients lean on a few readings. Zero means 1e4 (our choice:
	// far above any even spread, below the crowding of two clusters that
	// cover under 1% of the span).
	MaxCond float64
	// Debounce is how many consecutive breaching evaluations raise an
	// alert (and how many consecutive critical ones escalate it). Zero
	// means 3. At most 1000.
	Debounce int
	// ClearFraction is the hysteresis: a firing alert clears only when
	// its clear statistic (see Kind) drops below ClearFraction times the
	// lowest level of its limit. Zero means 0.8; otherwise 0 < f < 1.
	ClearFraction float64
	// Cooldown is the least time from clearing an alert to raising the
	// same (window, kind) again. Zero means none (DefaultRule sets 24h).
	Cooldown time.Duration
	// Horizon is how far ahead the trend is extrapolated for lead times
	// and ticket due dates. Zero means four times the longest lead-time
	// level, or 365 days without a lead-time limit. It must reach the
	// longest lead-time level divided by ClearFraction, so that clearing
	// can be judged.
	Horizon time.Duration
	// TicketMargin is how long before the predicted exit from tolerance a
	// ticket falls due. Zero means 7 days (our choice: a week to plan the
	// work). Negative is invalid.
	TicketMargin time.Duration

	// Limits are the alert limits; each is optional.
	Limits Limits

	// Detect configures the step and data-quality detectors; each is
	// off in the zero value. The caller runs them (they need each
	// reading, which the tracker never sees) and reports what they find
	// through Tracker.Observe.
	Detect Detectors

	// TicketKinds lists the kinds whose raise opens a recalibration
	// ticket. Nil means Slope and LeadTime, the kinds that predict
	// leaving tolerance; an empty non-nil slice opens none. A detector
	// kind opens one only when listed here, and only with a usable fit
	// in its Finding (the ticket's evidence and due date come from it).
	TicketKinds []Kind

	// Budget is the false-alarm budget the gates share (see Budget).
	Budget Budget
}

// Limits are the alert limits of a rule. A limit with both levels zero is
// off. Rate levels apply to the magnitude of the fitted coefficient, so
// they are positive for drift in either direction; the doubling limit
// watches growth only.
type Limits struct {
	// Slope levels, in Unit per day, on the line fit's c1.
	Slope RateLimit
	// Curvature levels, in Unit per day², on the parabola fit's c2.
	Curvature RateLimit
	// Doubling levels: an alert when the exp fit doubles faster than
	// this. The warning level is the longer time.
	Doubling DurationLimit
	// LeadTime levels: an alert when the trend model is predicted to
	// leave the tolerance band within this time. The warning level is
	// the longer time.
	LeadTime DurationLimit
}

// RateLimit holds the levels of a slope or curvature limit. Zero means
// the level is unset; Warning < Critical when both are set.
type RateLimit struct {
	Warning, Critical float64
}

// On reports whether a level is set.
func (l RateLimit) On() bool { return l.Warning != 0 || l.Critical != 0 }

// DurationLimit holds the levels of a time limit. Zero means the level is
// unset; Warning > Critical when both are set (shorter is worse).
type DurationLimit struct {
	Warning, Critical time.Duration
}

// On reports whether a level is set.
func (l DurationLimit) On() bool { return l.Warning != 0 || l.Critical != 0 }

// Defaults of the rule knobs.
const (
	defaultMinReadings   = 30
	defaultMaxCond       = 1e4
	defaultDebounce      = 3
	defaultClearFraction = 0.8
	defaultTicketMargin  = 7 * day
	defaultHorizon       = 365 * day
	maxDebounce          = 1000
	day                  = 24 * time.Hour
)

// DefaultRule returns a rule with every knob at its default, the windows
// {1d, 1h} and {30d, 1d}, a 0.5 coverage requirement and a 24h cooldown.
// Tolerance and Limits are left for the caller.
func DefaultRule() Rule {
	return Rule{
		Windows:       []rolling.WindowSpec{{Span: day, Pane: time.Hour}, {Span: 30 * day, Pane: day}},
		TrendModel:    rolling.Line,
		MinReadings:   defaultMinReadings,
		MinCoverage:   0.5,
		MaxCond:       defaultMaxCond,
		Debounce:      defaultDebounce,
		ClearFraction: defaultClearFraction,
		Cooldown:      24 * time.Hour,
		TicketMargin:  defaultTicketMargin,
	}
}

// resolve returns r with defaults filled in, or the joined RuleErrors.
func (r Rule) resolve() (Rule, error) {
	if r.TrendModel == rolling.ModelUnknown {
		r.TrendModel = rolling.Line
	}
	if r.MinReadings == 0 {
		r.MinReadings = defaultMinReadings
	}
	if r.MaxCond == 0 {
		r.MaxCond = defaultMaxCond
	}
	if r.Debounce == 0 {
		r.Debounce = defaultDebounce
	}
	if r.ClearFraction == 0 {
		r.ClearFraction = defaultClearFraction
	}
	if r.TicketMargin == 0 {
		r.TicketMargin = defaultTicketMargin
	}
	r.Detect = r.Detect.resolve()
	r.Budget = r.Budget.resolve()
	longest := max(r.Limits.LeadTime.Warning, r.Limits.LeadTime.Critical)
	if r.Horizon == 0 {
		r.Horizon = defaultHorizon
		if longest > 0 {
			r.Horizon = 4 * longest
			if need := time.Duration(float64(longest) / r.ClearFraction); r.ClearFraction > 0 && need > r.Horizon {
				r.Horizon = need
			}
		}
	}

	var errs []error
	bad := func(field string, v any, reason string) {
		errs = append(errs, &RuleError{Field: field, Value: v, Reason: reason})
	}
	finite := func(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
	if !(r.Tolerance > 0) || !finite(r.Tolerance) {
		bad("Tolerance", r.Tolerance, "must be finite and > 0")
	}
	if !finite(r.SpanLower) || !finite(r.SpanUpper) || ((r.SpanLower != 0 || r.SpanUpper != 0) && !(r.SpanLower < r.SpanUpper)) {
		bad("SpanLower/SpanUpper", [2]float64{r.SpanLower, r.SpanUpper}, "must be finite with lower < upper, or both 0")
	}
	if r.HasAsLeft && !finite(r.AsLeft) {
		bad("AsLeft", r.AsLeft, "must be finite")
	}
	if len(r.Windows) == 0 {
		bad("Windows", "[]", "at least one window is required")
	}
	for i, w := range r.Windows {
		if w.Span <= 0 || w.Pane <= 0 || w.Span%w.Pane != 0 {
			bad(fmt.Sprintf("Windows[%d]", i), w, "span and pane must be > 0, span a whole multiple of pane")
		}
		for j := range i {
			if r.Windows[j] == w {
				bad(fmt.Sprintf("Windows[%d]", i), w, fmt.Sprintf("repeats Windows[%d]", j))
			}
		}
	}
	if r.TrendModel != rolling.Line && r.TrendModel != rolling.Parabola {
		bad("TrendModel", r.TrendModel, "must be line or parabola")
	}
	if r.MinReadings < 4 {
		bad("MinReadings", r.MinReadings, "must be >= 4")
	}
	if !(r.MinCoverage >= 0 && r.MinCoverage <= 1) {
		bad("MinCoverage", r.MinCoverage, "must be in [0, 1]")
	}
	if !(r.MaxCond >= 1) || !finite(r.MaxCond) {
		bad("MaxCond", r.MaxCond, "must be finite and >= 1")
	}
	if r.Debounce < 1 || r.Debounce > maxDebounce {
		bad("Debounce", r.Debounce, fmt.Sprintf("must be in [1, %d]", maxDebounce))
	}
	if !(r.ClearFraction > 0 && r.ClearFraction < 1) {
		bad("ClearFraction", r.ClearFraction, "must be in (0, 1)")
	}
	if r.Cooldown < 0 {
		bad("Cooldown", r.Cooldown, "must be >= 0")
	}
	if r.TicketMargin < 0 {
		bad("TicketMargin", r.TicketMargin, "must be >= 0")
	}
	if r.Horizon < 0 {
		bad("Horizon", r.Horizon, "must be > 0")
	} else if longest > 0 && r.ClearFraction > 0 && float64(r.Horizon) < float64(longest)/r.ClearFraction {
		bad("Horizon", r.Horizon, "must reach the longest lead-time level / ClearFraction")
	}
	rate := func(name string, l RateLimit) {
		for _, lv := range []struct {
			name string
			v    float64
		}{{"Warning", l.Warning}, {"Critical", l.Critical}} {
			if !(lv.v >= 0) || !finite(lv.v) {
				bad("Limits."+name+"."+lv.name, lv.v, "must be finite and >= 0 (0 = unset)")
			}
		}
		if l.Warning > 0 && l.Critical > 0 && !(l.Warning < l.Critical) {
			bad("Limits."+name, l, "warning must be below critical")
		}
	}
	dur := func(name string, l DurationLimit) {
		if l.Warning < 0 {
			bad("Limits."+name+".Warning", l.Warning, "must be >= 0 (0 = unset)")
		}
		if l.Critical < 0 {
			bad("Limits."+name+".Critical", l.Critical, "must be >= 0 (0 = unset)")
		}
		if l.Warning > 0 && l.Critical > 0 && !(l.Warning > l.Critical) {
			bad("Limits."+name, l, "warning must be longer than critical")
		}
	}
	rate("Slope", r.Limits.Slope)
	rate("Curvature", r.Limits.Curvature)
	dur("Doubling", r.Limits.Doubling)
	dur("LeadTime", r.Limits.LeadTime)
	r.Detect.check(&r, bad)
	for i, k := range r.TicketKinds {
		if !k.valid() {
			bad(fmt.Sprintf("TicketKinds[%d]", i), k, "unknown kind")
		}
	}
	r.Budget.check(bad)
	if len(errs) > 0 {
		return r, errors.Join(errs...)
	}
	return r, nil
}

// on reports whether the rule sets kind k.
func (r *Rule) on(k Kind) bool { return k.info().on(r) }

// window returns the index of spec in the rule's windows, or -1.
func (r *Rule) window(spec rolling.WindowSpec) int {
	for i, w := range r.Windows {
		if w == spec {
			return i
		}
	}
	return -1
}

// lowest returns the least severe level that is set: Warning if set,
// else Critical.
func (l RateLimit) lowest() float64 {
	if l.Warning > 0 {
		return l.Warning
	}
	return l.Critical
}

func (l DurationLimit) lowest() time.Duration {
	if l.Warning > 0 {
		return l.Warning
	}
	return l.Critical
}

// level returns the value of level s of the limit of kind k in report
// units (see Event), or of its lowest level for SeverityUnknown or an
// unset level; 0 for detector kinds.
func (r *Rule) level(k Kind, s Severity) float64 {
	if f := k.info().level; f != nil {
		return f(r, s)
	}
	return 0
}

// level returns level s if set, else the lowest level set.
func (l RateLimit) level(s Severity) float64 {
	if s == Critical && l.Critical > 0 {
		return l.Critical
	}
	return l.lowest()
}

func durLevel(l DurationLimit, s Severity) time.Duration {
	if s == Critical && l.Critical > 0 {
		return l.Critical
	}
	return l.lowest()
}
