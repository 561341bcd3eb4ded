package alert

import "fmt"

// Kind names the quantity a limit is set on.
type Kind uint8

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
)

// kinds lists the kinds in evaluation and report order.
var kinds = [...]Kind{Slope, Curvature, Doubling, LeadTime}

var kindNames = [...]string{"unknown", "slope", "curvature", "doubling", "lead_time"}

func (k Kind) String() string { return enumName(kindNames[:], int(k)) }

// MarshalText encodes the name printed by String.
func (k Kind) MarshalText() ([]byte, error) { return marshalEnum(kindNames[:], int(k), "kind") }

// UnmarshalText decodes a name printed by String.
func (k *Kind) UnmarshalText(b []byte) error {
	return unmarshalEnum(kindNames[:], (*uint8)(k), b, "kind")
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
