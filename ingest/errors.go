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

// Errors of the CSV reader. Header problems come back from NewCSVReader
// wrapped with the column name; row problems arrive as the Err of a
// *RowError.
var (
	// ErrNoHeader is returned by NewCSVReader when the input holds no
	// record at all.
	ErrNoHeader = errors.New("ingest: csv input has no header row")

	// ErrDelimiter is returned by NewCSVReaderOptions for a delimiter
	// that cannot separate fields (a quote, CR or LF).
	ErrDelimiter = errors.New("ingest: csv delimiter cannot be a quote or line end")

	// ErrMissingColumn is returned by NewCSVReader when the header lacks
	// one of the columns sensor, time and value.
	ErrMissingColumn = errors.New("ingest: csv header lacks a required column")

	// ErrDuplicateColumn is returned by NewCSVReader when a required
	// column appears twice, which would make the row ambiguous.
	ErrDuplicateColumn = errors.New("ingest: csv header repeats a column")

	// ErrFieldCount is the cause of a row whose number of fields differs
	// from the header's.
	ErrFieldCount = errors.New("ingest: csv row has the wrong number of fields")

	// ErrBareQuote is the cause of a row with a '"' inside an unquoted
	// field (RFC 4180 section 2, rule 5).
	ErrBareQuote = errors.New(`ingest: csv bare " in unquoted field`)

	// ErrQuote is the cause of a row with a quoted field that is not
	// closed, or is followed by something other than a comma or line end.
	ErrQuote = errors.New(`ingest: csv extraneous or missing " in quoted field`)

	// ErrRowTooLong is the cause of a row longer than the reader's limit.
	ErrRowTooLong = errors.New("ingest: csv row too long")

	// ErrEmptyField is the cause of a row whose sensor, time or value is
	// empty.
	ErrEmptyField = errors.New("ingest: empty field")

	// ErrNumberSyntax is the cause of a value that is not a number.
	ErrNumberSyntax = errors.New("ingest: malformed number")

	// ErrNonFinite is the cause of a value that is NaN or infinite, or
	// too large for a float64.
	ErrNonFinite = errors.New("ingest: non-finite number")

	// ErrNumberRange is the cause of a value too small in magnitude for
	// a float64 (below 4.9e-324 but not zero, such as 1e-400), which
	// would otherwise read as 0.
	ErrNumberRange = errors.New("ingest: number too small for float64")
)

// Errors of the payload decoder. Whole-payload problems come back from
// Decoder.Decode as a *PayloadError wrapping ErrPayloadSyntax,
// ErrPayloadShape, ErrPayloadTooLarge or ErrLengthMismatch; per-reading
// problems are the Err of a Reject.
var (
	// ErrPayloadSyntax is returned when a payload is not valid JSON
	// (RFC 8259).
	ErrPayloadSyntax = errors.New("ingest: payload is not valid JSON")

	// ErrPayloadShape is returned when a payload is valid JSON but not a
	// reading, an array of readings or a batch object, or nests deeper
	// than 64 levels.
	ErrPayloadShape = errors.New("ingest: payload is not a reading or a batch")

	// ErrPayloadTooLarge is returned when a payload exceeds the
	// decoder's MaxBytes.
	ErrPayloadTooLarge = errors.New("ingest: payload too large")

	// ErrLengthMismatch is returned when the t, v and ref arrays of a
	// batch object differ in length.
	ErrLengthMismatch = errors.New("ingest: batch arrays differ in length")

	// ErrMissingField is the cause of a reading without t or v (or with
	// null there).
	ErrMissingField = errors.New("ingest: missing field")

	// ErrWrongType is the cause of a field of the wrong JSON type, such
	// as a quoted number for v.
	ErrWrongType = errors.New("ingest: wrong JSON type")
)

// ErrSensorID is returned (inside a *SensorIDError) for a sensor id that
// CheckSensorID refuses.
var ErrSensorID = errors.New("ingest: invalid sensor id")

// ErrTooManySensors is the cause of a reading refused because its sensor
// id is new and the service already holds Options.MaxSensors sensors.
var ErrTooManySensors = errors.New("ingest: sensor limit reached")

// ErrDuplicate is the cause of a reading refused by Dedup as a repeat of
// one already applied.
var ErrDuplicate = errors.New("ingest: duplicate reading")

// ErrStreamChanged is returned (inside a *StreamChangedError) by Run when
// the readings stream is not the one the DB's position was taken in.
var ErrStreamChanged = errors.New("ingest: stream changed under the stored position")

// ErrPortInUse is the cause of a *PortError when another program listens
// on the embedded NATS server's port.
var ErrPortInUse = errors.New("ingest: port in use")

// ErrRole is returned by Connect and RolePermissions for a user of the
// embedded server with an unknown role or a bad name.
var ErrRole = errors.New("ingest: bad bus user")

// ErrNoPassword is returned by Connect when a user's password variable
// of the embedded server is empty or not set.
var ErrNoPassword = errors.New("ingest: bus user without a password")

// Errors of a void or correction of a calibration, inside a
// *CalibrationRefError.
var (
	// ErrNoCalibration: the sensor has no calibration of that number
	// (or the service holds no state of the sensor, or the record is
	// damaged in the state file).
	ErrNoCalibration = errors.New("ingest: no such calibration")

	// ErrNotInForce: the calibration is not the sensor's latest in
	// force: voided or corrected already, or another one was recorded
	// after it.
	ErrNotInForce = errors.New("ingest: calibration not the latest in force")
)
