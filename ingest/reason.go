package ingest

import (
	"errors"
	"strconv"

	"driftfit/rolling"
)

// Reason classifies why input was refused. The decoder sets the reasons up
// to ReasonLengthMismatch that it can see in the bytes; the service adds
// the ones that need its configuration or clock (future time, too old,
// unit mismatch). String gives a stable snake_case label for metrics and
// dead-letter headers.
type Reason uint8

const (
	ReasonUnknown        Reason = iota // zero value: not classified
	ReasonMalformed                    // payload is not valid JSON or not a reading or batch
	ReasonMissingField                 // t or v absent or null
	ReasonBadTime                      // t present but not a usable time
	ReasonNonFinite                    // v or ref is NaN, infinite or beyond float64
	ReasonWrongType                    // a field or array element of the wrong JSON type
	ReasonOversized                    // payload larger than the limit
	ReasonFutureTime                   // t later than now plus the allowed skew
	ReasonTooOld                       // t older than every window of the sensor
	ReasonUnitMismatch                 // unit differs from the sensor's configured unit
	ReasonLengthMismatch               // batch arrays of different lengths
	ReasonBadSensorID                  // the subject's sensor id fails CheckSensorID
	ReasonTooManySensors               // a new sensor id beyond Options.MaxSensors
	ReasonDuplicate                    // a reading the sensor already holds (see Dedup)
	ReasonOutOfRange                   // v beyond ±rolling.MaxValue: a pane's sums of its squares would overflow
)

var reasonNames = [...]string{
	ReasonUnknown:        "unknown",
	ReasonMalformed:      "malformed_payload",
	ReasonMissingField:   "missing_field",
	ReasonBadTime:        "bad_time",
	ReasonNonFinite:      "non_finite",
	ReasonWrongType:      "wrong_type",
	ReasonOversized:      "oversized",
	ReasonFutureTime:     "future_time",
	ReasonTooOld:         "too_old",
	ReasonUnitMismatch:   "unit_mismatch",
	ReasonLengthMismatch: "length_mismatch",
	ReasonBadSensorID:    "bad_sensor_id",
	ReasonTooManySensors: "too_many_sensors",
	ReasonDuplicate:      "duplicate",
	ReasonOutOfRange:     "out_of_range",
}

// String returns the label, e.g. "bad_time"; values outside the list
// print as "reason(N)".
func (r Reason) String() string {
	if int(r) < len(reasonNames) {
		return reasonNames[r]
	}
	return "reason(" + strconv.Itoa(int(r)) + ")"
}

// foldReason classifies why a sensor's worker refused a decoded reading.
func foldReason(err error) Reason {
	switch {
	case errors.Is(err, ErrDuplicate):
		return ReasonDuplicate
	case errors.Is(err, rolling.ErrTooOld), errors.Is(err, errBeforeRestart):
		return ReasonTooOld
	case errors.Is(err, rolling.ErrOutOfRange):
		return ReasonOutOfRange
	}
	return ReasonUnknown
}
