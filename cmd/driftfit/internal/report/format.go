package report

import (
	"io"
	"slices"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

// Kind is a kind of record a command writes.
type Kind uint8

const (
	KindUnknown Kind = iota
	// Fits are final fits, one per sensor, window and model (replay).
	Fits
	// History is fit history, one record per window and pane close
	// (history).
	History
	// Events are alert events (alerts).
	Events
	// Tickets are recalibration tickets (tickets).
	Tickets
)

func (k Kind) String() string {
	switch k {
	case Fits:
		return "fits"
	case History:
		return "fit history"
	case Events:
		return "alert events"
	case Tickets:
		return "tickets"
	}
	return "unknown"
}

// Writer writes records of one kind in one format. A writer is given
// records of the one kind it was made for; Close flushes (and, for a
// picture, draws). Writers are not safe for concurrent use.
type Writer interface {
	// Fit writes the fit of model m in sol, the solution of the window
	// labelled window of sensor. For History, sol.Last is the record's
	// time.
	Fit(sensor, window string, sol *rolling.Solution, m rolling.Model) error
	Event(ev *alert.Event) error
	Ticket(tk *alert.Ticket) error
	Close() error
}

// Options are what a format may need besides the records.
type Options struct {
	// Unit returns the engineering unit of a sensor's values ("" when
	// unknown). Nil: no units are known.
	Unit func(sensor string) string
	// Annotate returns what a picture draws besides the fits of sensor,
	// whose records run from from to to (both inclusive). Nil, or a nil
	// result: the fits alone. An error fails the picture.
	Annotate func(sensor string, from, to time.Time) (*Annotations, error)
	// Now is when a listing is made: an open ticket whose due date has
	// passed by then is written overdue, whatever its stored flag
	// (alert.Ticket.Overdue, as of the ticket's last evaluation, which a
	// sensor that stopped reporting no longer gets). Zero: the stored
	// flag only.
	Now time.Time
}

// ticket returns tk as of o.Now (see Now).
func (o Options) ticket(tk *alert.Ticket) *alert.Ticket {
	if tk.Calibration != nil || tk.Overdue || o.Now.IsZero() || !o.Now.After(tk.Due) {
		return tk
	}
	c := *tk
	c.Overdue = true
	return &c
}

func (o Options) unit(sensor string) string {
	if o.Unit == nil {
		return ""
	}
	return o.Unit(sensor)
}

// format is one entry of the registry.
type format struct {
	name  string
	kinds []Kind
	new   func(w io.Writer, o Options) Writer
}

var text = []Kind{Fits, History, Events, Tickets}

// formats is the registry: one entry per output format.
var formats = []format{
	{"table", text, newTable},
	{"csv", text, newCSV},
	{"json", text, newJSON},
	{"png", []Kind{History}, newPNG},
	{"svg", []Kind{History}, newSVG},
}

// Names returns the formats that write k, in registry order.
func Names(k Kind) []string {
	var out []string
	for _, f := range formats {
		if slices.Contains(f.kinds, k) {
			out = append(out, f.name)
		}
	}
	return out
}

// Check reports whether format name writes k, as New would, without
// making a writer: nil, or a *FormatError.
func Check(name string, k Kind) error {
	for _, f := range formats {
		if f.name != name {
			continue
		}
		if !slices.Contains(f.kinds, k) {
			return &FormatError{Name: name, Kind: k, Want: Names(k), Err: ErrUnsupported}
		}
		return nil
	}
	return &FormatError{Name: name, Kind: k, Want: Names(k), Err: ErrUnknownFormat}
}

// New returns a writer of records of kind k in format name to w. The
// error is a *FormatError when no format of that name writes k.
func New(name string, k Kind, w io.Writer, o Options) (Writer, error) {
	if err := Check(name, k); err != nil {
		return nil, err
	}
	for _, f := range formats {
		if f.name == name {
			return f.new(w, o), nil
		}
	}
	panic("unreachable: Check found " + name)
}

// unsupported implements the Writer methods a format lacks.
type unsupported struct{}

func (unsupported) Fit(string, string, *rolling.Solution, rolling.Model) error { return ErrUnsupported }
func (unsupported) Event(*alert.Event) error                                   { return ErrUnsupported }
func (unsupported) Ticket(*alert.Ticket) error                                 { return ErrUnsupported }
