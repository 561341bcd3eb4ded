package chart

import (
	"sort"
	"time"

	"driftfit/alert"
)

// Calibration is a calibration as a picture of the sensor shows it at
// some time. One read from the sensor's calibration records carries its
// number and what became of it; one read back from tickets and events
// (a state file from before records were kept) carries Seq 0, and its
// AsFound and AsLeft only if it closed a ticket: seen through the reset
// events it caused, it carries the time alone.
type Calibration struct {
	Time    time.Time `json:"time"`
	AsFound *float64  `json:"as_found,omitempty"`
	AsLeft  *float64  `json:"as_left,omitempty"`
	Ticket  string    `json:"ticket,omitempty"` // the ticket it closed (the first, if several)

	// Seq is the number of its record (0: none); Recorded is when the
	// service stored it.
	Seq      uint64    `json:"seq,omitempty"`
	Recorded time.Time `json:"recorded,omitzero"`
	// Voided is when it was voided, Corrected when the correction
	// CorrectedBy replaced it, if that was at or before the time the
	// picture shows; zero otherwise. Reason is the reason given then.
	Voided      time.Time `json:"voided,omitzero"`
	Corrected   time.Time `json:"corrected,omitzero"`
	CorrectedBy uint64    `json:"corrected_by,omitempty"`
	Reason      string    `json:"reason,omitempty"`
	// Corrects is the number of the record this one replaced (0: none).
	Corrects uint64 `json:"corrects,omitempty"`
}

// Stands reports whether c was in force at the time the picture shows:
// neither voided nor corrected then. Only a calibration that stands is
// drawn as one, bounds an as-left value or restarts the judging of fits.
func (c *Calibration) Stands() bool { return c.Voided.IsZero() && c.Corrected.IsZero() }

// Calibrations returns the calibrations the tickets and events of one
// sensor record, in time order: each ticket's closing calibration, and
// each reset event at a time no ticket names. It is the reading for a
// sensor without calibration records: a voided calibration looks like
// any other here (its reset events stay), which the records tell apart.
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
