package alert

import (
	"math"

	"driftfit/rolling"
)

// kindInfo is everything the package knows about one Kind. Adding a kind
// means adding a constant at the end of the Kind list (enums.go) and its
// row here; nothing else in the package switches on kinds.
type kindInfo struct {
	name string
	// unit renders the report unit of values and limits (see Event) from
	// the sensor's unit.
	unit func(u string) string
	// fit: a limit judged on the fits of every window at its pane
	// closes (Tracker.Evaluate); otherwise a detector kind, reported by
	// the caller through Tracker.Observe.
	fit bool
	// perWindow: the kind's alerts are kept per window; otherwise one
	// per sensor (a stuck or silent sensor is so in every window).
	perWindow bool
	// ticket: a raise opens a recalibration ticket unless
	// Rule.TicketKinds says otherwise.
	ticket bool
	// tails: 2 when the gate judges a magnitude (either direction), 1
	// for one direction; 0 for kinds without a budgeted gate.
	tails int
	// on reports whether the rule sets the kind.
	on func(r *Rule) bool
	// level returns level s of the kind's limit in report units (the
	// lowest level set for SeverityUnknown); nil for detector kinds,
	// whose events carry the detector's own threshold.
	level func(r *Rule, s Severity) float64
	// evidence judges a solution that passed the window gates; nil for
	// detector kinds.
	evidence func(t *Tracker, j *judging) evidence
}

// judging is what the evidence functions of one evaluation share.
type judging struct {
	sol    *rolling.Solution
	trend  *rolling.Fit
	firing bool
	alpha  float64 // per-evaluation breach probability the gate may spend
}

var kindTable = [...]kindInfo{
	KindUnknown: {name: "unknown", unit: func(string) string { return "" }, on: func(*Rule) bool { return false }},
	Slope: {
		name: "slope", unit: func(u string) string { return u + "/d" }, fit: true, perWindow: true, ticket: true, tails: 2,
		on:    func(r *Rule) bool { return r.Limits.Slope.On() },
		level: func(r *Rule, s Severity) float64 { return r.Limits.Slope.level(s) },
		evidence: func(t *Tracker, j *judging) evidence {
			if f := &j.sol.Line; t.rule.usable(f) {
				return rateEvidence(f, 1, t.rule.Limits.Slope, t.rule.ClearFraction, 2, j.alpha)
			}
			return evidence{}
		},
	},
	Curvature: {
		name: "curvature", unit: func(u string) string { return u + "/d²" }, fit: true, perWindow: true, tails: 2,
		on:    func(r *Rule) bool { return r.Limits.Curvature.On() },
		level: func(r *Rule, s Severity) float64 { return r.Limits.Curvature.level(s) },
		evidence: func(t *Tracker, j *judging) evidence {
			if f := &j.sol.Parabola; t.rule.usable(f) {
				return rateEvidence(f, 2, t.rule.Limits.Curvature, t.rule.ClearFraction, 2, j.alpha)
			}
			return evidence{}
		},
	},
	Doubling: {
		name: "doubling", unit: func(string) string { return "1/d" }, fit: true, perWindow: true, tails: 1,
		on:    func(r *Rule) bool { return r.Limits.Doubling.On() },
		level: func(r *Rule, s Severity) float64 { return math.Ln2 / days(durLevel(r.Limits.Doubling, s)) },
		evidence: func(t *Tracker, j *judging) evidence {
			if f := &j.sol.Exp; t.rule.usable(f) {
				return doublingEvidence(f, t.rule.Limits.Doubling, t.rule.ClearFraction, j.alpha)
			}
			return evidence{}
		},
	},
	LeadTime: {
		name: "lead_time", unit: func(string) string { return "d" }, fit: true, perWindow: true, ticket: true, tails: 1,
		on:    func(r *Rule) bool { return r.Limits.LeadTime.On() },
		level: func(r *Rule, s Severity) float64 { return days(durLevel(r.Limits.LeadTime, s)) },
		evidence: func(t *Tracker, j *judging) evidence {
			if t.hasAsLeft && t.rule.usable(j.trend) {
				return t.rule.leadEvidence(j.trend, t.asLeft, j.firing, j.alpha)
			}
			return evidence{}
		},
	},
	Step: {
		name: "step", unit: func(u string) string { return u }, perWindow: true,
		on: func(r *Rule) bool { return r.Detect.Step.On },
	},
	Flatline: {
		name: "flatline", unit: func(string) string { return "d" },
		on: func(r *Rule) bool { return r.Detect.Flatline.For > 0 },
	},
	Spike: {
		name: "spike", unit: func(string) string { return "σ" },
		on: func(r *Rule) bool { return r.Detect.Spike.K > 0 },
	},
	Silent: {
		name: "silent", unit: func(string) string { return "d" },
		on: func(r *Rule) bool { return r.Detect.Silent > 0 },
	},
	OutOfSpan: {
		name: "out_of_span", unit: func(u string) string { return u },
		on: func(r *Rule) bool { return r.Detect.OutOfSpan },
	},
}

// info returns the table row of k; the KindUnknown row for a value
// outside the table.
func (k Kind) info() *kindInfo {
	if int(k) < len(kindTable) {
		return &kindTable[k]
	}
	return &kindTable[KindUnknown]
}

// valid reports whether k is a known kind other than KindUnknown.
func (k Kind) valid() bool { return k != KindUnknown && int(k) < len(kindTable) }

// Kinds returns every known kind in report order (the order of the
// constants), KindUnknown excluded. The slice is new on every call.
func Kinds() []Kind {
	out := make([]Kind, 0, len(kindTable)-1)
	for i := 1; i < len(kindTable); i++ {
		out = append(out, Kind(i))
	}
	return out
}

// FitKind reports whether k is judged on the fits by Tracker.Evaluate;
// the other kinds come from detectors through Tracker.Observe.
func (k Kind) FitKind() bool { return k.info().fit }

// PerWindow reports whether alerts of kind k are kept per window (true)
// or once per sensor (false: events carry an empty Window).
func (k Kind) PerWindow() bool { return k.info().perWindow }

// reportUnit returns the unit of values and limits of kind k.
func reportUnit(k Kind, unit string) string { return k.info().unit(unit) }

// ReportUnit returns the unit of the values and limits of events of
// kind k for a sensor whose readings are in unit (see Event).
func ReportUnit(k Kind, unit string) string { return reportUnit(k, unit) }

// opensTicket reports whether a raise of kind k opens a ticket under r.
func (r *Rule) opensTicket(k Kind) bool {
	if r.TicketKinds == nil {
		return k.info().ticket
	}
	for _, x := range r.TicketKinds {
		if x == k {
			return true
		}
	}
	return false
}
