package query

import (
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

// Calibrations returns the stored calibration records f selects (Since
// and Until by the calibration's time; Open: only those in force), by
// sensor and number. Records that cannot be read are listed as damaged,
// and the walk's error (a *store.SkippedError for them) is returned
// with the records.
func Calibrations(src Source, f Filter) ([]Calibration, error) {
	var all []Calibration
	err := src.Calibrations("", func(sensor string, n uint64, data []byte) error {
		if !f.match(sensor) {
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
