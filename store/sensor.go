package store

import (
	"errors"
	"fmt"

	bolt "go.etcd.io/bbolt"

	"driftfit/rolling"
)

// LoadSensor reads the stored state of one sensor, for a reader beside
// the service: a sensor with the windows its panes were written with,
// holding the panes stored at the last commit that took it. ok is false
// when nothing is stored for it (never committed, dropped or set
// aside). It reads in one read transaction and writes nothing: panes
// that left every window are skipped, not deleted.
//
// Errors: ErrSensorID for an invalid id, and an error matching
// ErrCorrupt, naming the sensor, for stored state Restore would set
// aside (a value that fails its checksum, window specs or a pane that do
// not decode).
func (db *DB) LoadSensor(id string) (s *rolling.Sensor, ok bool, err error) {
	if err := checkID(id); err != nil {
		return nil, false, err
	}
	err = db.bolt.View(func(tx *bolt.Tx) error {
		sensors, panes := tx.Bucket(bucketSensors), tx.Bucket(bucketPanes)
		if sensors == nil || panes == nil {
			return nil
		}
		v := sensors.Get([]byte(id))
		if v == nil {
			return nil
		}
		// Restore's own reading of one sensor, with the windows the
		// panes were written with rather than those configured now.
		newSensor := func(string) (*rolling.Sensor, error) {
			specs, err := decodeSpecs(v[:max(len(v)-sealSize, 0)])
			if err != nil {
				return nil, err
			}
			return rolling.NewSensor(specs...)
		}
		var sh restoreShard
		var loaded []rolling.PaneKey
		r, bad, err := sh.loadOne(id, v, panes.Cursor(), newSensor, &loaded)
		switch {
		case err == nil && bad != nil:
			err = bad
		case errors.Is(err, rolling.ErrBadSpec):
			// Specs that decode but that no sensor can have.
			err = fmt.Errorf("%w: window specs: %w", ErrCorrupt, err)
		}
		if err != nil {
			if !errors.Is(err, ErrCorrupt) {
				err = fmt.Errorf("%w: %w", ErrCorrupt, err)
			}
			return fmt.Errorf("store: load sensor %s: %w", id, err)
		}
		s, ok = r.Sensor, r.Sensor != nil
		return nil
	})
	return s, ok, err
}
