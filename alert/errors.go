package alert

import (
	"errors"
	"fmt"
)

var (
	// ErrBadRule is returned by NewTracker for a rule with invalid fields;
	// the returned error joins one *RuleError per problem.
	ErrBadRule = errors.New("alert: bad rule")

	// ErrUnknownWindow is returned by Tracker.Evaluate for a solution whose
	// window is not one of the rule's windows.
	ErrUnknownWindow = errors.New("alert: window not in rule")

	// ErrStale is returned by Tracker.Evaluate for a solution that holds
	// readings from before the sensor's last calibration: the caller has
	// not restarted the sensor's fits yet, and such a fit mixes the old
	// calibration with the new one.
	ErrStale = errors.New("alert: fit holds readings from before the last calibration")

	// ErrBadTime is returned for an evaluation or calibration time that is
	// zero or outside the years 1678–2261 (the int64-nanosecond range the
	// fits and the stored state use).
	ErrBadTime = errors.New("alert: time out of range")

	// ErrBadCalibration is returned by Tracker.Calibrate for a calibration
	// with a non-finite value or a time before the previous calibration.
	ErrBadCalibration = errors.New("alert: bad calibration")

	// ErrBadState is returned by Tracker.UnmarshalBinary for bytes that
	// are not a valid state encoding, or the state of another sensor.
	ErrBadState = errors.New("alert: bad state encoding")

	// ErrBadFinding is returned by Tracker.Observe for a finding whose
	// kind is not a detector kind set in the rule, whose window does not
	// match the kind, or whose numbers are not finite.
	ErrBadFinding = errors.New("alert: bad finding")

	// ErrNonFinite is returned by Deviations for a live member whose value
	// is NaN or infinite.
	ErrNonFinite = errors.New("alert: value is not finite")
)

// RuleError describes one invalid field of a Rule. It unwraps to
// ErrBadRule.
type RuleError struct {
	Field  string // field path, e.g. "Limits.Slope.Warning"
	Value  any    // the offending value
	Reason string // what is wrong, e.g. "must be > 0"
}

func (e *RuleError) Error() string {
	return fmt.Sprintf("alert: rule %s = %v: %s", e.Field, e.Value, e.Reason)
}

// Unwrap returns ErrBadRule.
func (e *RuleError) Unwrap() error { return ErrBadRule }
