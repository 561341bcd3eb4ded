package ingest

import (
	"fmt"
	"strconv"
	"strings"
	"unicode"
	"unicode/utf8"

	"driftfit/store"
)

// MaxSensorID is the longest sensor id accepted, in bytes: the store's
// limit, so that every id routed can also be committed.
const MaxSensorID = store.MaxSensorID

// SensorIDError is returned by CheckSensorID: what is wrong with ID.
// It unwraps to ErrSensorID.
type SensorIDError struct {
	ID      string
	Problem string
}

func (e *SensorIDError) Error() string {
	return "ingest: sensor id " + QuoteID(e.ID) + ": " + e.Problem
}

// Unwrap returns ErrSensorID.
func (e *SensorIDError) Unwrap() error { return ErrSensorID }

// CheckSensorID reports whether id can name a sensor: 1 to MaxSensorID
// bytes of valid UTF-8, no control or white-space characters, none of the
// NATS wildcards '*' and '>', and no empty dot-separated token (no
// leading, trailing or doubled dot). The error is a *SensorIDError.
//
// The rules make every id a valid single-subject NATS suffix and a valid
// store key, and keep ids printable: an id is echoed into logs, headers
// and terminals.
func CheckSensorID(id string) error {
	problem := ""
	switch {
	case id == "":
		problem = "empty"
	case len(id) > MaxSensorID:
		problem = fmt.Sprintf("%d bytes, longer than %d", len(id), MaxSensorID)
	case !utf8.ValidString(id):
		problem = "not valid UTF-8"
	case id[0] == '.' || id[len(id)-1] == '.' || strings.Contains(id, ".."):
		problem = "empty token (leading, trailing or doubled dot)"
	default:
		for i, r := range id {
			switch {
			case r == '*' || r == '>':
				problem = fmt.Sprintf("wildcard %q at byte %d", r, i)
			case unicode.IsControl(r) || unicode.IsSpace(r) || !unicode.IsPrint(r):
				problem = fmt.Sprintf("character %U at byte %d is not printable", r, i)
			}
			if problem != "" {
				break
			}
		}
	}
	if problem == "" {
		return nil
	}
	return &SensorIDError{ID: id, Problem: problem}
}

// quoteMax is the most bytes of an id QuoteID prints: enough for any
// real id, short enough that a hostile one cannot flood a log line.
const quoteMax = 256

// QuoteID returns id as a double-quoted Go string literal safe to print
// anywhere: control characters (terminal escape sequences included),
// invalid UTF-8 and other non-printable runes are escaped. An id longer
// than 256 bytes is cut at a rune boundary and its full length appended,
// e.g. "abc…"+(5000 bytes).
func QuoteID(id string) string {
	if len(id) <= quoteMax {
		return strconv.Quote(id)
	}
	cut := quoteMax
	for cut > 0 && !utf8.RuneStart(id[cut]) {
		cut--
	}
	return strconv.Quote(id[:cut]) + "…(" + strconv.Itoa(len(id)) + " bytes)"
}
