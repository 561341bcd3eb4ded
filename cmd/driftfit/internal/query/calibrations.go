package query

import (
	"cmp"
	"slices"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/chart"
	"driftfit/ingest"
)

// Calibration is a stored calibration record as listed. InForce marks
// the sensor's latest calibration not voided or corrected: the one whose
// as-left is the centre of its tolerance band. A record damaged in the
// file comes with Damaged set, its number and sensor only.
type Calibration struct {
	ingest.CalibrationRecord
	InForce bool `json:"in_force"`
	Damaged bool `json:"damaged,omitempty"`
}

// RecordSource is what holds calibration records: the file
// (*store.DB) or the running service (*readapi.Client).
type RecordSource interface {
	Calibrations(sensor string, fn func(sensor string, n uint64, data []byte) error) error
}

// Calibrations returns the stored calibration records f selects (Since
// and Until by the calibration's time; Open: only those in force), by
// sensor and number. Records that cannot be read are listed as damaged,
// and the walk's error (a *store.SkippedError for them) is returned
// with the records.
func Calibrations(src Source, f Filter) ([]Calibration, error) {
	all, err := records(src, "", f.match)
	out := all[:0]
	for _, c := range all {
		switch {
		case f.Open && !c.InForce,
			!f.Since.IsZero() && c.Time.Before(f.Since), !f.Until.IsZero() && !c.Time.Before(f.Until):
			continue
		}
		out = append(out, c)
	}
	return out, err
}

// Records returns the calibration records of sensor id, every sensor's
// when id is "", by sensor and number, marked as Calibrations marks
// them, with the walk's error as Calibrations returns it.
func Records(src RecordSource, id string) ([]Calibration, error) {
	return records(src, id, func(string) bool { return true })
}

func records(src RecordSource, id string, keep func(string) bool) ([]Calibration, error) {
	var all []Calibration
	err := src.Calibrations(id, func(sensor string, n uint64, data []byte) error {
		if !keep(sensor) {
			return nil
		}
		c := Calibration{CalibrationRecord: ingest.CalibrationRecord{Sensor: sensor, Seq: n}, Damaged: true}
		if data != nil {
			if r, err := ingest.DecodeCalibrationRecord(data); err == nil && r.Sensor == sensor && r.Seq == n {
				c = Calibration{CalibrationRecord: r}
			}
		}
		all = append(all, c)
		return nil
	})
	// The latest record standing of each sensor is in force; records come
	// by sensor, then number.
	for i := len(all) - 1; i >= 0; i-- {
		if i+1 < len(all) && all[i+1].Sensor == all[i].Sensor {
			continue
		}
		for j := i; j >= 0 && all[j].Sensor == all[i].Sensor; j-- {
			if all[j].Damaged {
				break // whether a later record stands cannot be told
			}
			if all[j].Status == ingest.CalibrationRecorded {
				all[j].InForce = true
				break
			}
		}
	}
	return all, err
}

// CalibrationsAt returns the calibrations of one sensor as they stood
// at asof (zero: as they stand now), in time order, for the pictures
// and exports of the sensor: made from recs, its calibration records
// (as Records returns them), and only where those say nothing from tks
// and evs, its tickets and events as they stood at asof
// (chart.Calibrations).
//
// A record counts from the time it was recorded; one recorded after asof
// is left out. One voided or corrected at or before asof comes with
// Voided or Corrected set (chart.Calibration.Stands is then false); one
// voided or corrected later stood at asof and comes as it stood. A
// correction is a record of its own, with the corrected values.
//
// Tickets and events tell of the calibrations from before the sensor's
// records were kept (a state file of an older build): those strictly
// before the earliest readable record. Later ones are the records' to
// tell, since the reset events of a voided calibration stay; so when
// every record of the sensor is damaged none is taken from them.
func CalibrationsAt(recs []Calibration, tks []alert.Ticket, evs []alert.Event, asof time.Time) []chart.Calibration {
	var out []chart.Calibration
	var earliest time.Time
	for _, r := range recs {
		if r.Damaged {
			continue
		}
		if earliest.IsZero() || r.Time.Before(earliest) {
			earliest = r.Time
		}
		if !asof.IsZero() && r.Recorded.After(asof) {
			continue
		}
		af, al := r.AsFound, r.AsLeft
		c := chart.Calibration{Time: r.Time, AsFound: &af, AsLeft: &al, Seq: r.Seq, Recorded: r.Recorded, Corrects: r.Corrects}
		if len(r.Closed) > 0 {
			c.Ticket = r.Closed[0]
		}
		if r.Status != ingest.CalibrationRecorded && (asof.IsZero() || !r.Changed.After(asof)) {
			c.Reason = r.Reason
			if r.Status == ingest.CalibrationVoided {
				c.Voided = r.Changed
			} else {
				c.Corrected, c.CorrectedBy = r.Changed, r.CorrectedBy
			}
		}
		out = append(out, c)
	}
	if len(recs) == 0 || !earliest.IsZero() {
		for _, c := range chart.Calibrations(tks, evs) {
			if len(recs) == 0 || c.Time.Before(earliest) {
				out = append(out, c)
			}
		}
	}
	slices.SortStableFunc(out, func(a, b chart.Calibration) int {
		if c := a.Time.Compare(b.Time); c != 0 {
			return c
		}
		return cmp.Compare(a.Seq, b.Seq)
	})
	return out
}
