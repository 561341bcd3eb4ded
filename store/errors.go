package store

import (
	"errors"
	"fmt"
)

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

	// ErrChecksum is returned (inside a *ChecksumError naming the bucket
	// and key) for a stored value whose CRC-32C does not match its bytes.
	// It wraps ErrCorrupt.
	ErrChecksum = fmt.Errorf("%w: checksum mismatch", ErrCorrupt)

	// ErrFile is returned by Open for a file that cannot be a complete
	// bbolt file: empty, shorter than its meta pages say, or with no
	// valid meta page. The wrapping message names the file and the fix.
	ErrFile = errors.New("store: damaged database file")

	// ErrSetAside is wrapped by the reasons a sensor's stored state was
	// set aside (Restored.SetAside, CommitStats.SetAside).
	ErrSetAside = errors.New("store: sensor set aside")

	// ErrRecord is returned by Batch.Record for a solution that cannot be
	// stored: a window spec that is not positive, no time (a zero Last),
	// a time outside the range of int64 nanoseconds, or a Fit.Err that is
	// not one of the rolling sentinels.
	ErrRecord = errors.New("store: fit record cannot be stored")
)

// SensorError is a problem with the stored state of one sensor, for
// which Restore or Commit set the sensor aside. It matches ErrSetAside
// and the reason, Err.
type SensorError struct {
	Sensor string
	Err    error
}

func (e *SensorError) Error() string {
	return fmt.Sprintf("store: sensor %s set aside: %v", e.Sensor, e.Err)
}

// Unwrap returns ErrSetAside and the reason.
func (e *SensorError) Unwrap() []error { return []error{ErrSetAside, e.Err} }

// SkippedError is returned by a read that left out stored values that
// failed their checksum or did not decode, after it handed every good
// one to its caller. It unwraps to the first such problem (which matches
// ErrCorrupt).
type SkippedError struct {
	What  string // what was skipped, plural: "fit records"
	N     int
	First error
}

func (e *SkippedError) Error() string {
	return fmt.Sprintf("store: %d %s skipped as damaged, the first: %v", e.N, e.What, e.First)
}

func (e *SkippedError) Unwrap() error { return e.First }

func (e *SkippedError) add(err error) {
	if e.N == 0 {
		e.First = err
	}
	e.N++
}

// err returns e, or nil when nothing was skipped.
func (e *SkippedError) err() error {
	if e.N == 0 {
		return nil
	}
	return e
}
