package alert

import (
	"fmt"

	"driftfit/rolling"
)

// Reason says whether a window was judged, or why not. A window not
// judged gives no evidence: it breaks a pending run but never clears a
// firing alert.
type Reason uint8

// The numeric values may be stored or counted by callers: new reasons go
// at the end.
const (
	// ReasonUnknown is the zero Reason: no evaluation yet.
	ReasonUnknown Reason = iota
	// Judged: the window passed every gate.
	Judged
	// TooFewReadings: N below MinReadings.
	TooFewReadings
	// LowCoverage: the fraction of panes holding readings is below
	// MinCoverage.
	LowCoverage
	// IllConditioned: the trend fit failed (singular, no time spread),
	// is not positive definite, holds non-finite numbers, or its
	// condition number exceeds MaxCond.
	IllConditioned
	// SerialUnknown: the serial-correlation correction of the standard
	// errors could not be estimated, so no gate can be trusted.
	SerialUnknown
	// PeersIncomplete: a peer-group member's deviation while too few
	// members are live or usable for the reference (see Group).
	PeersIncomplete
	// FewEffective: the trend fit's effective count of independent
	// readings (Fit.NEff, from the serial correlation) is below
	// MinReadings. The correction rests on an estimate of the lag-1
	// autocorrelation r1, and n_e = n(1 − r1)/(1 + r1) moves with 1 − r1:
	// on AR(1) noise of φ 0.98 read hourly a 30-day window's n_e was 10.7
	// on average against the true 7.3, its spread ±37%, and the gates,
	// judging at the extreme tail the budget asks for, raised 0.069
	// tickets a sensor-year against the promise of 0.01
	// (TestBudget_PlantNoise). Such a window holds too little independent
	// information to date a drift.
	FewEffective
)

var reasonNames = [...]string{"unknown", "judged", "too_few_readings", "low_coverage", "ill_conditioned",
	"serial_correlation_unknown", "peer_group_incomplete", "too_few_effective_readings"}

func (r Reason) String() string { return enumName(reasonNames[:], int(r)) }

// MarshalText encodes the name printed by String.
func (r Reason) MarshalText() ([]byte, error) { return marshalEnum(reasonNames[:], int(r), "reason") }

// UnmarshalText decodes a name printed by String.
func (r *Reason) UnmarshalText(b []byte) error {
	return unmarshalEnum(reasonNames[:], (*uint8)(r), b, "reason")
}

// Judgement is whether one window was judged at one evaluation, and the
// numbers behind the verdict, so that callers can show it, count it by
// Reason and log it when it changes (compare with the previous
// Judgement of the window using Same).
type Judgement struct {
	Window rolling.WindowSpec `json:"-"`
	Reason Reason             `json:"reason"`
	// N and MinN: readings in the window and the rule's least.
	N    int `json:"n"`
	MinN int `json:"min_n"`
	// Coverage and MinCoverage: the fraction of panes with readings and
	// the rule's least.
	Coverage    float64 `json:"coverage"`
	MinCoverage float64 `json:"min_coverage"`
	// Cond and MaxCond: the trend fit's condition number (0 when it
	// failed) and the rule's largest.
	Cond    float64 `json:"cond"`
	MaxCond float64 `json:"max_cond"`
	// NEff: the trend fit's effective count of independent readings (0
	// when the fit carries no serial correction); judged against MinN.
	NEff float64 `json:"n_eff,omitempty"`
	// Live and Need: for PeersIncomplete, the group members usable for
	// the reference and the least needed.
	Live int `json:"live,omitempty"`
	Need int `json:"need,omitempty"`
}

// OK reports whether the window was judged.
func (j Judgement) OK() bool { return j.Reason == Judged }

// Same reports whether j and o carry the same verdict (window and
// reason), the change worth logging; the numbers move with every
// evaluation.
func (j Judgement) Same(o Judgement) bool { return j.Window == o.Window && j.Reason == o.Reason }

func (j Judgement) String() string {
	w := WindowName(j.Window)
	switch j.Reason {
	case TooFewReadings:
		return fmt.Sprintf("%s not judged: n %d < %d", w, j.N, j.MinN)
	case LowCoverage:
		return fmt.Sprintf("%s not judged: coverage %.2f < %.2f", w, j.Coverage, j.MinCoverage)
	case IllConditioned:
		return fmt.Sprintf("%s not judged: ill-conditioned (cond %.3g, max %.3g)", w, j.Cond, j.MaxCond)
	case SerialUnknown:
		return w + " not judged: serial correlation unknown"
	case FewEffective:
		return fmt.Sprintf("%s not judged: effective readings %.1f < %d", w, j.NEff, j.MinN)
	case PeersIncomplete:
		return fmt.Sprintf("%s not judged: peer group incomplete (%d of %d needed)", w, j.Live, j.Need)
	}
	return w + " " + j.Reason.String()
}

// judge returns the verdict of the window gates on sol with trend fit
// trend: the first gate that fails, in the order readings, coverage,
// conditioning, serial correlation, effective readings.
func (r *Rule) judgement(sol *rolling.Solution, trend *rolling.Fit) Judgement {
	j := Judgement{Window: sol.Window, N: sol.N, MinN: r.MinReadings, MinCoverage: r.MinCoverage, MaxCond: r.MaxCond, Reason: Judged}
	if sol.Panes > 0 {
		j.Coverage = sol.Coverage()
	}
	if trend.OK() {
		j.Cond = trend.Cond
	}
	switch {
	case sol.N < r.MinReadings:
		j.Reason = TooFewReadings
	case sol.Panes == 0 || j.Coverage < r.MinCoverage:
		j.Reason = LowCoverage
	case !r.usable(trend):
		j.Reason = IllConditioned
	default:
		if _, ok := seFor(trend, 1); !ok {
			j.Reason = SerialUnknown
		} else if trend.Pairs > 0 {
			j.NEff = trend.NEff
			if trend.NEff < float64(r.MinReadings) {
				j.Reason = FewEffective
			}
		}
	}
	return j
}

// trend returns the fit of sol the gates and the lead time judge: the
// rule's trend model, or the line when that fit is not usable and the
// line's is.
func (r *Rule) trend(sol *rolling.Solution) *rolling.Fit {
	trend := sol.Fit(r.TrendModel)
	if !r.usable(trend) && r.usable(&sol.Line) {
		trend = &sol.Line
	}
	return trend
}

// Serial is the serial-correlation estimate a tracker keeps for its
// sensor (see Tracker.Evaluate): the lag-1 autocorrelation R1 of the
// residuals of the Parabola fit of Window, over Pairs pairs of
// consecutive readings (rolling.Fit.R1 and Pairs). The zero value is no
// estimate.
type Serial struct {
	R1     float64
	Pairs  int
	Window rolling.WindowSpec
}

// SerialOf returns the estimate a tracker keeps once it has judged sols,
// the newest solutions of one sensor's windows: that of the Parabola fit
// with the most pairs among those whose correction could be estimated
// (rolling.Fit.SerialErr nil); zero when none could. A tracker keeps its
// estimate across calibrations and windows that lose their estimate, so
// after those the two can differ.
func SerialOf(sols ...*rolling.Solution) Serial {
	var s Serial
	for _, sol := range sols {
		if p := &sol.Parabola; p.Pairs > s.Pairs && p.SerialErr == nil {
			s = Serial{R1: p.R1, Pairs: p.Pairs, Window: sol.Window}
		}
	}
	return s
}

// took returns the estimate after judging sol: sol's own when it has one
// resting on at least as many pairs, or comes from the window s came
// from; else s.
func (s Serial) took(sol *rolling.Solution) Serial {
	p := &sol.Parabola
	if p.Pairs > 0 && p.SerialErr == nil && (p.Pairs >= s.Pairs || sol.Window == s.Window) {
		return Serial{R1: p.R1, Pairs: p.Pairs, Window: sol.Window}
	}
	return s
}

// lend returns sol carrying the estimate s (rolling.Solution.WithSerial)
// when s rests on more pairs than sol's own and sol's is unknown or
// smaller; else sol. A solution with no serial information (Pairs 0) is
// left alone (see seFor).
func (s Serial) lend(sol *rolling.Solution) *rolling.Solution {
	p := &sol.Parabola
	if p.Pairs > 0 && s.Pairs > p.Pairs && (p.SerialErr != nil || s.R1 > p.R1) {
		c := sol.WithSerial(s.R1, s.Pairs)
		return &c
	}
	return sol
}

// Judge returns the judgement Tracker.Evaluate gives sol under rule r
// when the tracker holds the serial estimate s (SerialOf makes it from
// the sensor's other windows), without any alert state: it decides and
// changes nothing. It is for readers that show what the rules make of a
// stored fit, so that they say what the service says. The peer-group
// gate of EvaluatePeers is not applied, nor the check against the last
// calibration (ErrStale), which the caller knows of.
//
// Errors: one wrapping ErrBadRule (joining a *RuleError per field) for
// an invalid r, ErrUnknownWindow for a window not in r.
func Judge(r Rule, sol *rolling.Solution, s Serial) (Judgement, error) {
	rr, err := r.resolve()
	if err != nil {
		return Judgement{}, fmt.Errorf("alert: judge window %s: %w", WindowName(sol.Window), err)
	}
	if rr.window(sol.Window) < 0 {
		return Judgement{}, fmt.Errorf("%w: window %s", ErrUnknownWindow, WindowName(sol.Window))
	}
	sol = s.took(sol).lend(sol)
	return rr.judgement(sol, rr.trend(sol)), nil
}
