package store

import (
	"bytes"
	"fmt"

	bolt "go.etcd.io/bbolt"
)

// Dropped counts what DropSensor deleted.
type Dropped struct {
	Specs    bool // the window specs
	Panes    int
	Restart  bool // the time its fits last restarted
	Seq      bool // the stream sequence its state held
	Alert    bool // its alert state
	SetAside int  // keys of state set aside earlier (Restored.SetAside)
}

// Any reports whether anything was deleted.
func (d Dropped) Any() bool {
	return d.Specs || d.Panes > 0 || d.Restart || d.Seq || d.Alert || d.SetAside > 0
}

// DropSensor deletes the stored state of one sensor in one transaction:
// its window specs, panes, restart time, stream sequence, alert state
// and whatever of it was set aside. Its fit history is kept, as the record of what the
// sensor did (history retention deletes it in time), and so are alert
// events, tickets and calibration records, which belong to the plant's
// record. Once dropped,
// a sensor that reports again starts with empty windows. Call it only
// while no service holds the file: a running service would write the
// sensor back from memory at its next commit.
func (db *DB) DropSensor(id string) (Dropped, error) {
	var d Dropped
	if err := checkID(id); err != nil {
		return d, err
	}
	err := db.bolt.Update(func(tx *bolt.Tx) error {
		d = Dropped{}
		del := func(name, key []byte) (bool, error) {
			bk := tx.Bucket(name)
			if bk == nil || bk.Get(key) == nil {
				return false, nil
			}
			return true, bk.Delete(key)
		}
		delPrefix := func(name, prefix []byte) (int, error) {
			bk := tx.Bucket(name)
			if bk == nil {
				return 0, nil
			}
			n := 0
			c := bk.Cursor()
			for k, _ := c.Seek(prefix); k != nil && bytes.HasPrefix(k, prefix); k, _ = c.Seek(prefix) {
				if err := c.Delete(); err != nil {
					return n, err
				}
				n++
			}
			return n, nil
		}
		key, prefix := []byte(id), appendIDPrefix(nil, id)
		var err error
		if d.Specs, err = del(bucketSensors, key); err != nil {
			return err
		}
		if d.Restart, err = del(bucketRestarts, key); err != nil {
			return err
		}
		if d.Seq, err = del(bucketSeqs, key); err != nil {
			return err
		}
		if d.Alert, err = del(bucketAlerts, key); err != nil {
			return err
		}
		if d.Panes, err = delPrefix(bucketPanes, prefix); err != nil {
			return err
		}
		d.SetAside, err = delPrefix(bucketSetAside, prefix)
		return err
	})
	if err != nil {
		return Dropped{}, fmt.Errorf("store: drop sensor %s: %w", id, err)
	}
	return d, nil
}
