package store

import (
	"bytes"
	"errors"
	"fmt"
	"time"

	bolt "go.etcd.io/bbolt"

	"driftfit/rolling"
)

// Restored describes one sensor rebuilt by Restore.
type Restored struct {
	ID     string
	Sensor *rolling.Sensor

	// Saved are the window specs the stored panes were written with;
	// Changed reports that they differ from the sensor's (count, order,
	// span or pane). Panes of a width the sensor still has carry over
	// exactly, whatever the spans: a pane's sums do not depend on them.
	Saved   []rolling.WindowSpec
	Changed bool

	// Panes counts the stored panes the sensor holds after the restore.
	// Dropped counts the stored panes it cannot hold: older than every
	// window, or of a width no window has any more. Restore deletes them
	// from the file, unless it was opened read-only.
	Panes, Dropped int
}

// Restore rebuilds every stored sensor, in id order: newSensor makes the
// sensor with the windows configured now (return nil, nil to leave a
// sensor out: its data stays in the file), Restore loads the stored panes
// into it with LoadPane, then calls fn. After the last sensor, dropped
// panes are deleted in one transaction, and the sensors are handed to fn
// only after that succeeded; fn may use the DB.
//
// An error from newSensor or fn stops the restore and is returned
// wrapped with the sensor id; so is a pane that does not decode
// (wrapping rolling.ErrBadPane): a restore never skips stored state it
// cannot read.
func (db *DB) Restore(newSensor func(id string) (*rolling.Sensor, error), fn func(Restored) error) error {
	var out []Restored
	var cleanup Batch
	err := db.bolt.View(func(tx *bolt.Tx) error {
		sensors, panes := tx.Bucket(bucketSensors), tx.Bucket(bucketPanes)
		if sensors == nil || panes == nil {
			return nil
		}
		pc := panes.Cursor()
		var loaded []rolling.PaneKey
		return sensors.ForEach(func(k, v []byte) error {
			id := string(k)
			saved, err := decodeSpecs(v)
			if err != nil {
				return fmt.Errorf("sensor %s: %w", id, err)
			}
			s, err := newSensor(id)
			if err != nil {
				return fmt.Errorf("sensor %s: %w", id, err)
			}
			if s == nil {
				return nil
			}
			r := Restored{ID: id, Sensor: s, Saved: saved, Changed: s.Windows() != len(saved)}
			for i := 0; i < s.Windows() && !r.Changed; i++ {
				r.Changed = s.Spec(i) != saved[i]
			}
			prefix := appendIDPrefix(nil, id)
			loaded = loaded[:0]
			for pk, pv := pc.Seek(prefix); pk != nil && bytes.HasPrefix(pk, prefix); pk, pv = pc.Next() {
				_, key, err := splitPaneKey(pk)
				if err != nil {
					return fmt.Errorf("sensor %s: %w", id, err)
				}
				switch err := s.LoadPane(key, pv); {
				case err == nil:
					loaded = append(loaded, key)
				case errors.Is(err, rolling.ErrTooOld) || errors.Is(err, rolling.ErrBadSpec):
					r.Dropped++
					cleanup.addDelete(pk)
				default:
					return fmt.Errorf("sensor %s pane %v/%d: %w", id, key.Width, key.Index, err)
				}
			}
			// Loading a newer pane slides the older ones out of the ring, so
			// panes loaded in key order may since have left every window.
			r.Panes = len(loaded)
			s.Horizon(func(width time.Duration, oldest int64) {
				stale := 0
				for _, key := range loaded {
					if key.Width == width && key.Index < oldest {
						stale++
					}
				}
				if stale > 0 {
					r.Panes -= stale
					r.Dropped += stale
					cleanup.addHorizon(id, width, oldest)
				}
			})
			out = append(out, r)
			return nil
		})
	})
	if err != nil {
		return fmt.Errorf("store: restore: %w", err)
	}
	if cleanup.Len() > 0 && !db.bolt.IsReadOnly() {
		if _, err := db.Commit(&cleanup); err != nil {
			return fmt.Errorf("store: restore: delete dropped panes: %w", err)
		}
	}
	for _, r := range out {
		if err := fn(r); err != nil {
			return fmt.Errorf("store: restore sensor %s: %w", r.ID, err)
		}
	}
	return nil
}
