package store

import "errors"

var (
	// ErrLocked is returned by Open when another process (or another DB
	// value in this process) holds the file's lock for longer than
	// Options.LockTimeout. It is wrapped with the path.
	ErrLocked = errors.New("store: database file is locked by another user")

	// ErrSchema is returned by Open for a file whose schema version this
	// build does not know, or a bbolt file that was not written by this
	// package. The wrapping message names both versions.
	ErrSchema = errors.New("store: unknown schema version")

	// ErrSensorID is returned for a sensor id that is empty, longer than
	// MaxSensorID bytes, or contains the key separator byte 0x00.
	ErrSensorID = errors.New("store: invalid sensor id")

	// ErrCorrupt is returned when stored bytes do not decode: a value of
	// an unknown format, a truncated record or a malformed key.
	ErrCorrupt = errors.New("store: corrupt record")

	// ErrRecord is returned by Batch.Record for a solution that cannot be
	// stored: a window spec that is not positive, no time (a zero Last),
	// a time outside the range of int64 nanoseconds, or a Fit.Err that is
	// not one of the rolling sentinels.
	ErrRecord = errors.New("store: fit record cannot be stored")
)
