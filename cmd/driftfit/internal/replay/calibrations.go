package replay

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"slices"
	"strconv"
	"time"

	"driftfit/alert"
	"driftfit/ingest"
)

// Calibration is one row of a calibrations file: a calibration of Sensor
// recorded at Time with its as-found and as-left values, as
// `driftfit calibrated` sends one to the running service.
type Calibration struct {
	Line   int // 1-based line of the row in its file
	Sensor string
	alert.Calibration
}

// Errors of a calibrations file.
var (
	// ErrCalibrationHeader is returned by ReadCalibrations when the
	// header lacks a column or names one twice.
	ErrCalibrationHeader = errors.New("replay: calibrations header")
	// ErrCalibrationRow is the cause of a *CalibrationError.
	ErrCalibrationRow = errors.New("replay: bad calibration")
)

// CalibrationError is a bad row of a calibrations file: its line, the
// field and its value. It unwraps to ErrCalibrationRow and the cause.
type CalibrationError struct {
	Line         int
	Field, Value string // Field "" for a problem with the whole row
	Err          error
}

func (e *CalibrationError) Error() string {
	if e.Field == "" {
		return fmt.Sprintf("calibrations line %d: %v", e.Line, e.Err)
	}
	return fmt.Sprintf("calibrations line %d: %s %q: %v", e.Line, e.Field, e.Value, e.Err)
}

// Unwrap returns ErrCalibrationRow and the cause.
func (e *CalibrationError) Unwrap() []error { return []error{ErrCalibrationRow, e.Err} }

// calibrationColumns are the header names a calibrations file must hold.
var calibrationColumns = [...]string{"sensor", "time", "as_found", "as_left"}

// maxCalibrationValue bounds the value field copied into an error, so a
// runaway field cannot fill the terminal.
const maxCalibrationValue = 64

// ReadCalibrations reads a calibrations file: CSV (RFC 4180) with a
// header naming the columns sensor, time, as_found and as_left in any
// order (other columns are ignored), one calibration a row; the sensor an
// id ingest.CheckSensorID accepts, time as the
// readings' (RFC 3339 or Unix seconds, ingest.ParseTime), the values
// finite numbers in the sensor's unit. Good rows come back sorted by time
// (file order among equal times); each bad row is a *CalibrationError in
// bad, and the rows around it are kept. err is set only when the file
// cannot be read at all: no header, a column missing, or an I/O error.
func ReadCalibrations(r io.Reader) (cals []Calibration, bad []error, err error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.ReuseRecord = true
	head, err := cr.Read()
	if err != nil {
		if errors.Is(err, io.EOF) {
			return nil, nil, fmt.Errorf("%w: empty file, want the columns sensor,time,as_found,as_left", ErrCalibrationHeader)
		}
		return nil, nil, fmt.Errorf("%w: %w", ErrCalibrationHeader, err)
	}
	var col [len(calibrationColumns)]int
	for i, name := range calibrationColumns {
		col[i] = -1
		for j, h := range head {
			if j == 0 {
				h = trimBOM(h)
			}
			if h != name {
				continue
			}
			if col[i] >= 0 {
				return nil, nil, fmt.Errorf("%w: column %q named twice", ErrCalibrationHeader, name)
			}
			col[i] = j
		}
		if col[i] < 0 {
			return nil, nil, fmt.Errorf("%w: no column %q (want sensor,time,as_found,as_left)", ErrCalibrationHeader, name)
		}
	}
	width := slices.Max(col[:]) + 1
	for {
		rec, rerr := cr.Read()
		if errors.Is(rerr, io.EOF) {
			break
		}
		var pe *csv.ParseError
		switch {
		case errors.As(rerr, &pe):
			bad = append(bad, &CalibrationError{Line: pe.StartLine, Err: pe.Err})
			continue
		case rerr != nil:
			return nil, nil, rerr
		}
		// FieldPos only after a good read: it panics when the record
		// has no fields (a parse error).
		line, _ := cr.FieldPos(0)
		switch {
		case len(rec) < width:
			bad = append(bad, &CalibrationError{Line: line, Err: fmt.Errorf("%d fields, want at least %d", len(rec), width)})
			continue
		}
		c, cerr := parseCalibration(line, rec[col[0]], rec[col[1]], rec[col[2]], rec[col[3]])
		if cerr != nil {
			bad = append(bad, cerr)
			continue
		}
		cals = append(cals, c)
	}
	slices.SortStableFunc(cals, func(a, b Calibration) int { return a.Time.Compare(b.Time) })
	return cals, bad, nil
}

func parseCalibration(line int, sensor, at, found, left string) (Calibration, error) {
	bad := func(field, value string, err error) error {
		if len(value) > maxCalibrationValue {
			value = value[:maxCalibrationValue]
		}
		return &CalibrationError{Line: line, Field: field, Value: value, Err: err}
	}
	var idErr *ingest.SensorIDError
	if errors.As(ingest.CheckSensorID(sensor), &idErr) {
		return Calibration{}, bad("sensor", sensor, fmt.Errorf("%w: %s", ingest.ErrSensorID, idErr.Problem))
	}
	ns, err := ingest.ParseTime([]byte(at))
	if err != nil {
		return Calibration{}, bad("time", at, err)
	}
	c := Calibration{Line: line, Sensor: sensor}
	c.Time = time.Unix(0, ns).UTC()
	for _, f := range []struct {
		name, text string
		dst        *float64
	}{{"as_found", found, &c.AsFound}, {"as_left", left, &c.AsLeft}} {
		v, err := strconv.ParseFloat(f.text, 64)
		if err != nil {
			return Calibration{}, bad(f.name, f.text, errors.New("not a number"))
		}
		if math.IsInf(v, 0) || math.IsNaN(v) {
			return Calibration{}, bad(f.name, f.text, errors.New("not finite"))
		}
		*f.dst = v
	}
	return c, nil
}

func trimBOM(s string) string {
	const bom = "\uFEFF"
	if len(s) >= len(bom) && s[:len(bom)] == bom {
		return s[len(bom):]
	}
	return s
}
