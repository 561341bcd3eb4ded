package configs

import (
	"errors"
	"fmt"
	"strconv"
	"strings"
)

// Sentinel errors. Every problem found in a configuration comes back as a
// *FieldError whose Unwrap returns one of these, so callers branch with
// errors.Is and read the details with errors.As.
var (
	// ErrSyntax is returned when the file is not well-formed YAML.
	ErrSyntax = errors.New("configs: yaml syntax error")
	// ErrUnknownField is returned for a key the schema does not define.
	ErrUnknownField = errors.New("configs: unknown field")
	// ErrType is returned when a value has the wrong YAML type (a list where a
	// mapping belongs, text where a number belongs).
	ErrType = errors.New("configs: wrong type")
	// ErrMissing is returned when a required field is absent.
	ErrMissing = errors.New("configs: required field missing")
	// ErrDuration is returned for a duration that does not parse.
	ErrDuration = errors.New("configs: bad duration")
	// ErrUnit is returned for a quantity or rate that does not parse: no
	// unit, an unknown time unit, a missing "/time" on a rate.
	ErrUnit = errors.New("configs: bad unit")
	// ErrUnitMismatch is returned when a quantity's unit is neither the
	// class unit nor "%span".
	ErrUnitMismatch = errors.New("configs: unit does not match the class unit")
	// ErrRange is returned for a number or duration outside its allowed range.
	ErrRange = errors.New("configs: value out of range")
	// ErrWindow is returned for a window whose span is not a whole positive
	// multiple of its pane, or a repeated window span.
	ErrWindow = errors.New("configs: bad window")
	// ErrLimitOrder is returned when a warning level is beyond its critical
	// level.
	ErrLimitOrder = errors.New("configs: warning level beyond critical level")
	// ErrDuplicate is returned for a repeated class, group or sensor name.
	ErrDuplicate = errors.New("configs: duplicate name")
	// ErrOverlap is returned when two classes (or two peer groups) have
	// patterns that some sensor id matches both.
	ErrOverlap = errors.New("configs: patterns overlap")
	// ErrAmbiguous is returned when a sensor id matches more than one class
	// and is not pinned to one.
	ErrAmbiguous = errors.New("configs: sensor matches more than one class")
	// ErrNoClass is returned when a sensor id matches no class.
	ErrNoClass = errors.New("configs: sensor matches no class")
	// ErrUndefined is returned for a reference to a class or group that is
	// not defined.
	ErrUndefined = errors.New("configs: undefined name")
	// ErrCredential is returned when a secret is written in the file instead
	// of being referenced through an environment variable or a file path.
	ErrCredential = errors.New("configs: credential written in the file")
	// ErrConflict is returned for settings that contradict each other.
	ErrConflict = errors.New("configs: contradictory settings")
)

// FieldError describes one problem at one place in a configuration file.
// Line and Column are 1-based; they are zero when the position is unknown
// (a Config built in code rather than parsed). Field is the path of the
// field, with 0-based list indices and sensor ids in brackets, e.g.
// "classes[1].limits.slope.warning" or "sensors[qm.u1.pt-101].as_left".
// Value is the offending value as written (credentials redacted), empty when
// the problem is a missing value.
type FieldError struct {
	File   string
	Line   int
	Column int
	Field  string
	Value  string
	Err    error  // one of the sentinels above
	Detail string // what is wrong, in words, without the sentinel's text
}

// Error formats the problem as "file:line:col: field = "value": what: detail",
// which editors and terminals recognise as a location.
func (e *FieldError) Error() string {
	var b strings.Builder
	if e.File != "" {
		b.WriteString(e.File)
		b.WriteByte(':')
	}
	if e.Line > 0 {
		fmt.Fprintf(&b, "%d:%d:", e.Line, e.Column)
	}
	if b.Len() > 0 {
		b.WriteByte(' ')
	}
	if e.Field != "" {
		b.WriteString(e.Field)
		if e.Value != "" {
			b.WriteString(" = ")
			b.WriteString(strconv.Quote(e.Value))
		}
		b.WriteString(": ")
	} else if e.Value != "" {
		b.WriteString(strconv.Quote(e.Value))
		b.WriteString(": ")
	}
	if e.Err != nil {
		b.WriteString(strings.TrimPrefix(e.Err.Error(), "configs: "))
	} else {
		b.WriteString("invalid")
	}
	if e.Detail != "" {
		b.WriteString(": ")
		b.WriteString(e.Detail)
	}
	return b.String()
}

// Unwrap returns the sentinel, so errors.Is(err, ErrUnit) works.
func (e *FieldError) Unwrap() error { return e.Err }
