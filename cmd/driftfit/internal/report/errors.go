package report

import (
	"errors"
	"fmt"
	"strings"
)

var (
	// ErrUnknownFormat is returned by New for a name no format has.
	ErrUnknownFormat = errors.New("report: unknown format")
	// ErrUnsupported is returned by New, and by a Writer's methods, for a
	// kind of record the format cannot write (a picture of alert events).
	ErrUnsupported = errors.New("report: format cannot write this kind of record")
	// ErrNothingToDraw is returned by a picture's Close when no fit
	// record was given.
	ErrNothingToDraw = errors.New("report: nothing to draw")
)

// FormatError names a format New refused and the formats that would do.
type FormatError struct {
	Name string
	Kind Kind
	Want []string // formats that write Kind
	Err  error    // ErrUnknownFormat or ErrUnsupported
}

func (e *FormatError) Error() string {
	w := e.Want
	list := strings.Join(w, ", ")
	if len(w) > 1 {
		list = strings.Join(w[:len(w)-1], ", ") + " or " + w[len(w)-1]
	}
	if errors.Is(e.Err, ErrUnsupported) {
		return fmt.Sprintf("%q cannot write %s: want %s", e.Name, e.Kind, list)
	}
	return fmt.Sprintf("%q: want %s", e.Name, list)
}

func (e *FormatError) Unwrap() error { return e.Err }
