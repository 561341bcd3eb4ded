package query

import (
	"encoding/json"
	"fmt"
	"path"
	"slices"
	"time"

	"driftfit/alert"
)

// Filter selects alert events and tickets.
type Filter struct {
	// Sensor is a path.Match pattern of sensor ids; "" matches all.
	Sensor       string
	Since, Until time.Time // zero: open end
	// Open keeps what is still open: the alerts still firing (each with
	// the event that raised or last escalated it), the open tickets.
	Open bool
}

// CheckPattern reports a malformed sensor pattern as a usage error.
func CheckPattern(pattern string) error {
	if _, err := path.Match(pattern, ""); err != nil {
		return &UsageError{"sensor", pattern, err.Error()}
	}
	return nil
}

func (f *Filter) match(id string) bool {
	if f.Sensor == "" {
		return true
	}
	ok, _ := path.Match(f.Sensor, id)
	return ok
}

// Events returns the stored events f selects, in time order.
func Events(src Source, f Filter) ([]alert.Event, error) {
	var evs []alert.Event
	type key struct{ sensor, window, kind string }
	firing := map[key]int{}
	err := src.Events(f.Since, f.Until, func(_ time.Time, data []byte) error {
		ev, err := decodeEvent(data)
		if err != nil {
			return err
		}
		if !f.match(ev.Sensor) {
			return nil
		}
		k := key{ev.Sensor, ev.Window, ev.Kind.String()}
		if f.Open {
			switch ev.Type {
			case alert.Raised, alert.Escalated:
				firing[k] = len(evs)
			default:
				delete(firing, k)
			}
		}
		evs = append(evs, ev)
		return nil
	})
	if err != nil || !f.Open {
		return evs, err
	}
	var keep []alert.Event
	for i, ev := range evs {
		if j, ok := firing[key{ev.Sensor, ev.Window, ev.Kind.String()}]; ok && j == i {
			keep = append(keep, ev)
		}
	}
	return keep, nil
}

func decodeEvent(data []byte) (alert.Event, error) {
	var ev alert.Event
	if err := json.Unmarshal(data, &ev); err != nil {
		return ev, fmt.Errorf("stored event: %w", err)
	}
	return ev, nil
}

func decodeTicket(data []byte) (alert.Ticket, error) {
	var tk alert.Ticket
	if err := json.Unmarshal(data, &tk); err != nil {
		return tk, fmt.Errorf("stored ticket: %w", err)
	}
	return tk, nil
}

// Tickets returns the stored tickets f selects (Since and Until by the
// time a ticket was opened), by due date.
func Tickets(src Source, f Filter) ([]alert.Ticket, error) {
	var tks []alert.Ticket
	err := src.Tickets(func(_ string, data []byte) error {
		tk, err := decodeTicket(data)
		if err != nil {
			return err
		}
		switch {
		case !f.match(tk.Sensor), f.Open && tk.Calibration != nil,
			!f.Since.IsZero() && tk.Opened.Before(f.Since), !f.Until.IsZero() && !tk.Opened.Before(f.Until):
			return nil
		}
		tks = append(tks, tk)
		return nil
	})
	slices.SortFunc(tks, func(a, b alert.Ticket) int { return a.Due.Compare(b.Due) })
	return tks, err
}
