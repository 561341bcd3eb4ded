package chart

import (
	"sort"
	"time"

	"driftfit/alert"
)

// Calibration is a recorded calibration. AsFound and AsLeft are known
// only for calibrations that closed a ticket; a calibration seen only
// through the reset events it caused carries the time alone.
type Calibration struct {
	Time    time.Time `json:"time"`
	AsFound *float64  `json:"as_found,omitempty"`
	AsLeft  *float64  `json:"as_left,omitempty"`
	Ticket  string    `json:"ticket,omitempty"`
}

// Calibrations returns the calibrations the tickets and events of one
// sensor record, in time order: each ticket's closing calibration, and
// each reset event at a time no ticket names.
func Calibrations(tks []alert.Ticket, evs []alert.Event) []Calibration {
	var out []Calibration
	seen := map[int64]bool{}
	for _, tk := range tks {
		if c := tk.Calibration; c != nil {
			af, al := c.AsFound, c.AsLeft
			out = append(out, Calibration{Time: c.Time, AsFound: &af, AsLeft: &al, Ticket: tk.ID})
			seen[c.Time.UnixNano()] = true
		}
	}
	for _, ev := range evs {
		if ev.Type == alert.Reset && !seen[ev.At.UnixNano()] {
			out = append(out, Calibration{Time: ev.At})
			seen[ev.At.UnixNano()] = true
		}
	}
	sort.SliceStable(out, func(i, j int) bool { return out[i].Time.Before(out[j].Time) })
	return out
}
