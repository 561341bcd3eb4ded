package alert

import "fmt"

// Kind names what an alert is about: a limit on a fit (Slope, Curvature,
// Doubling, LeadTime) or a detector of steps and data quality (Step,
// Flatline, Spike, Silent, OutOfSpan). The properties of each kind
// (name, report unit, evidence, tickets) are in one table, kinds.go.
type Kind uint8

// The numeric values are stored (Tracker state, tickets): new kinds go
// at the end.
const (
	// KindUnknown is the zero Kind.
	KindUnknown Kind = iota
	// Slope limits the line fit's drift rate c1, in unit per day.
	Slope
	// Curvature limits the parabola fit's curvature c2, in unit per day².
	Curvature
	// Doubling limits exponential growth: the exp fit's growth rate c1 per
	// day against ln 2 / doubling time.
	Doubling
	// LeadTime limits how soon the trend model is predicted to leave the
	// tolerance band around the as-left value.
	LeadTime
	// Step is a sudden change of level confirmed by the CUSUM of
	// one-step prediction errors (StepDetector); value: the step size in
	// unit.
	Step
	// Flatline is a stuck sensor: readings within a resolution of each
	// other for a configured time and count (FlatlineDetector); value:
	// how long, in days.
	Flatline
	// Spike is a run of robust outliers against the fit's prediction
	// (SpikeDetector); value: the largest |error|/scale of the run.
	Spike
	// Silent is a sensor with no reading for a configured time (Silence);
	// value: days since the last reading.
	Silent
	// OutOfSpan is a reading beyond the calibrated range SpanLower ..
	// SpanUpper (SpanCheck); value: the reading, in unit.
	OutOfSpan
)

func (k Kind) String() string {
	if int(k) < len(kindTable) {
		return kindTable[k].name
	}
	return kindTable[KindUnknown].name
}

// MarshalText encodes the name printed by String.
func (k Kind) MarshalText() ([]byte, error) {
	if int(k) >= len(kindTable) {
		return nil, fmt.Errorf("alert: kind %d has no name", k)
	}
	return []byte(kindTable[k].name), nil
}

// UnmarshalText decodes a name printed by String.
func (k *Kind) UnmarshalText(b []byte) error {
	for i := range kindTable {
		if string(b) == kindTable[i].name {
			*k = Kind(i)
			return nil
		}
	}
	return fmt.Errorf("alert: unknown kind %q", b)
}

// ParseKind returns the kind named s, as printed by String.
func ParseKind(s string) (Kind, error) {
	var k Kind
	err := k.UnmarshalText([]byte(s))
	return k, err
}

// Severity is the level of a limit that is breached.
type Severity uint8

const (
	// SeverityUnknown is the zero Severity: no level breached.
	SeverityUnknown Severity = iota
	// Warning is the lower level of a limit.
	Warning
	// Critical is the higher level of a limit.
	Critical
)

var severityNames = [...]string{"unknown", "warning", "critical"}

func (s Severity) String() string { return enumName(severityNames[:], int(s)) }

// MarshalText encodes the name printed by String.
func (s Severity) MarshalText() ([]byte, error) {
	return marshalEnum(severityNames[:], int(s), "severity")
}

// UnmarshalText decodes a name printed by String.
func (s *Severity) UnmarshalText(b []byte) error {
	return unmarshalEnum(severityNames[:], (*uint8)(s), b, "severity")
}

// State is where the alert of one (window, kind) stands.
type State uint8

const (
	// StateUnknown is the zero State: never evaluated.
	StateUnknown State = iota
	// Inactive: no breach, not in cooldown.
	Inactive
	// Pending: breached on fewer than Debounce consecutive evaluations,
	// or on enough of them while the cooldown still runs.
	Pending
	// Firing: raised and not yet cleared.
	Firing
	// Resolved: cleared less than Cooldown ago, not breached since.
	Resolved
)

var stateNames = [...]string{"unknown", "inactive", "pending", "firing", "resolved"}

func (s State) String() string { return enumName(stateNames[:], int(s)) }

// MarshalText encodes the name printed by String.
func (s State) MarshalText() ([]byte, error) { return marshalEnum(stateNames[:], int(s), "state") }

// UnmarshalText decodes a name printed by String.
func (s *State) UnmarshalText(b []byte) error {
	return unmarshalEnum(stateNames[:], (*uint8)(s), b, "state")
}

// EventType says what happened to an alert.
type EventType uint8

const (
	// EventUnknown is the zero EventType.
	EventUnknown EventType = iota
	// Raised: the alert started firing.
	Raised
	// Escalated: a firing warning became critical.
	Escalated
	// Cleared: the evidence fell below the clear level.
	Cleared
	// Reset: a calibration ended the alert.
	Reset
)

var eventNames = [...]string{"unknown", "raised", "escalated", "cleared", "reset"}

func (e EventType) String() string { return enumName(eventNames[:], int(e)) }

// MarshalText encodes the name printed by String.
func (e EventType) MarshalText() ([]byte, error) {
	return marshalEnum(eventNames[:], int(e), "event type")
}

// UnmarshalText decodes a name printed by String.
func (e *EventType) UnmarshalText(b []byte) error {
	return unmarshalEnum(eventNames[:], (*uint8)(e), b, "event type")
}

func enumName(names []string, i int) string {
	if i <= 0 || i >= len(names) {
		return names[0]
	}
	return names[i]
}

func marshalEnum(names []string, i int, what string) ([]byte, error) {
	if i < 0 || i >= len(names) {
		return nil, fmt.Errorf("alert: %s %d has no name", what, i)
	}
	return []byte(names[i]), nil
}

func unmarshalEnum(names []string, dst *uint8, b []byte, what string) error {
	for i := range names {
		if string(b) == names[i] {
			*dst = uint8(i)
			return nil
		}
	}
	return fmt.Errorf("alert: unknown %s %q", what, b)
}
