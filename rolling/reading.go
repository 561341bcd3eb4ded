package rolling

// Reading is one measurement of one sensor.
//
// UnixNano is the measurement time in nanoseconds since the Unix epoch
// (UTC). Integer nanoseconds keep pane assignment exact and keep the
// fits free of the rounding that float64 Unix seconds would add.
// Value is in the sensor's engineering unit and must be finite.
type Reading struct {
	UnixNano int64
	Value    float64
}
