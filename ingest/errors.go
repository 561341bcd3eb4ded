package ingest

import "errors"

// Sentinel errors. Callers branch on them with errors.Is; the typed errors
// of this package (TimeError, RowError, PayloadError) unwrap to one of them.
var (
	// ErrTimeSyntax is returned when a time is neither RFC 3339 nor a
	// decimal number of Unix seconds.
	ErrTimeSyntax = errors.New("ingest: malformed time")

	// ErrTimeRange is returned when a well-formed time lies outside the
	// range of int64 Unix nanoseconds (1677-09-21T00:12:43.145224192Z to
	// 2262-04-11T23:47:16.854775807Z).
	ErrTimeRange = errors.New("ingest: time outside the int64 nanosecond range")

	// ErrTimePrecision is returned when a numeric time is not a whole
	// number of nanoseconds (more than 9 decimals after the seconds), so
	// it cannot be held exactly.
	ErrTimePrecision = errors.New("ingest: time finer than one nanosecond")
)
