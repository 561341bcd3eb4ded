package store

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"runtime"
	"sync"
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

	// Restart is the time, in Unix ns, the sensor's fits last restarted
	// (Batch.SetRestart); 0 when they never did.
	Restart int64

	// Seq is the stream sequence of the last message the stored state of
	// the sensor holds (Batch.SetSeq); 0 when none was stored.
	Seq uint64

	// Panes counts the stored panes the sensor holds after the restore.
	// Dropped counts the stored panes it cannot hold: older than every
	// window, or of a width no window has any more. Restore deletes them
	// from the file, unless it was opened read-only.
	Panes, Dropped int

	// SetAside, when not nil, says the sensor's stored state could not
	// be trusted (a value failed its checksum, a pane did not decode)
	// and why; it names the sensor and matches ErrSetAside. Sensor is
	// then a fresh one from newSensor, not marked saved, holding nothing
	// of the stored state; Restart is kept only if it was readable, and
	// Seq is 0, so the fresh sensor takes every message after the stored
	// position. Unless the file is read-only, Restore moved the sensor's
	// window specs and panes out of the way, into the "set-aside"
	// bucket, so they never mix with what the fresh sensor writes;
	// DropSensor deletes them. Log it: the sensor's windows start empty.
	SetAside *SensorError
}

// Restore rebuilds every stored sensor, in id order: newSensor makes the
// sensor with the windows configured now (return nil, nil to leave a
// sensor out: its data stays in the file), Restore loads the stored panes
// into it with LoadPane, then calls fn. After the last sensor, dropped
// panes are deleted in one transaction, and the sensors are handed to fn
// only after that succeeded; fn may use the DB. A sensor whose windows
// are unchanged comes back marked saved (rolling.Sensor.MarkSaved).
//
// Large files are read by several goroutines at once, each a range of
// sensors in its own read transaction: a restart is mostly the first
// touch of the memory of every window and of the mapped file, which two
// cores do in less time than one. newSensor must therefore be safe for
// concurrent use; fn is called from the caller's goroutine.
//
// An error from newSensor or fn stops the restore and is returned
// wrapped with the sensor id. A sensor whose stored state cannot be
// trusted — a value that fails its checksum, window specs or a restart
// time that do not decode, a pane LoadPane refuses (rolling.ErrBadPane)
// — does not stop the restore: it is set aside (Restored.SetAside) and
// handed to fn fresh, so one damaged sensor never holds up the rest and
// nothing it stored is ever used.
func (db *DB) Restore(newSensor func(id string) (*rolling.Sensor, error), fn func(Restored) error) error {
	bounds, err := db.restoreBounds(runtime.GOMAXPROCS(0))
	if err != nil {
		return fmt.Errorf("store: restore: %w", err)
	}
	shards := make([]restoreShard, len(bounds)+1)
	var wg sync.WaitGroup
	for i := range shards {
		var lo, hi []byte
		if i > 0 {
			lo = bounds[i-1]
		}
		if i < len(bounds) {
			hi = bounds[i]
		}
		wg.Add(1)
		go func() {
			defer wg.Done()
			sh := &shards[i]
			sh.err = db.bolt.View(func(tx *bolt.Tx) error { return sh.load(tx, lo, hi, newSensor) })
		}()
	}
	wg.Wait()
	cleanup := make([]*Batch, 0, len(shards))
	for i := range shards {
		if err := shards[i].err; err != nil {
			return fmt.Errorf("store: restore: %w", err)
		}
		if shards[i].cleanup.Len() > 0 {
			cleanup = append(cleanup, &shards[i].cleanup)
		}
	}
	if len(cleanup) > 0 && !db.bolt.IsReadOnly() {
		if _, err := db.Commit(cleanup...); err != nil {
			return fmt.Errorf("store: restore: delete dropped panes: %w", err)
		}
	}
	for i := range shards {
		for _, r := range shards[i].out {
			if err := fn(r); err != nil {
				return fmt.Errorf("store: restore sensor %s: %w", r.ID, err)
			}
		}
	}
	return nil
}

// restoreShardMin is the fewest sensors worth a goroutine of their own.
const restoreShardMin = 5000

// restoreBounds splits the stored sensors into at most n ranges of about
// equal count and returns the first id of each range after the first.
func (db *DB) restoreBounds(n int) (bounds [][]byte, err error) {
	err = db.bolt.View(func(tx *bolt.Tx) error {
		sensors := tx.Bucket(bucketSensors)
		if sensors == nil {
			return nil
		}
		c := sensors.Cursor()
		count := 0
		for k, _ := c.First(); k != nil; k, _ = c.Next() {
			count++
		}
		n = min(n, count/restoreShardMin)
		if n < 2 {
			return nil
		}
		i, per := 0, count/n
		for k, _ := c.First(); k != nil && len(bounds) < n-1; k, _ = c.Next() {
			if i > 0 && i%per == 0 {
				bounds = append(bounds, bytes.Clone(k))
			}
			i++
		}
		return nil
	})
	return bounds, err
}

// restoreShard is one range of sensors rebuilt by one goroutine.
type restoreShard struct {
	out     []Restored
	cleanup Batch
	err     error
}

// load rebuilds the sensors with ids in [lo, hi); nil bounds are open.
func (sh *restoreShard) load(tx *bolt.Tx, lo, hi []byte, newSensor func(id string) (*rolling.Sensor, error)) error {
	sensors, panes := tx.Bucket(bucketSensors), tx.Bucket(bucketPanes)
	if sensors == nil || panes == nil {
		return nil
	}
	sc, pc := sensors.Cursor(), panes.Cursor()
	restarts := tx.Bucket(bucketRestarts)
	seqs := tx.Bucket(bucketSeqs)
	var loaded []rolling.PaneKey
	k, v := sc.First()
	if lo != nil {
		k, v = sc.Seek(lo)
	}
	for ; k != nil && (hi == nil || bytes.Compare(k, hi) < 0); k, v = sc.Next() {
		id := string(k)
		restart, bad := readRestart(restarts, k)
		restartBad := bad != nil
		var r Restored
		var err error
		if !restartBad {
			mark := sh.cleanup.mark()
			if r, bad, err = sh.loadOne(id, v, pc, newSensor, &loaded); err != nil {
				return err
			}
			r.Restart = restart
			if bad == nil {
				r.Seq, bad = readSeq(seqs, k)
			}
			if bad != nil {
				sh.cleanup.undo(mark)
			}
		}
		if bad != nil {
			if r, err = sh.setAside(id, restart, restartBad, bad, newSensor); err != nil {
				return err
			}
		}
		if r.Sensor == nil {
			continue
		}
		sh.out = append(sh.out, r)
	}
	return nil
}

// loadOne rebuilds sensor id from its stored specs v and its panes. A
// nil Sensor with no error means newSensor left the sensor out; bad is
// a reason not to trust the stored state, err one to stop the restore.
func (sh *restoreShard) loadOne(id string, v []byte, pc *bolt.Cursor,
	newSensor func(id string) (*rolling.Sensor, error), loaded *[]rolling.PaneKey) (r Restored, bad, err error) {
	r.ID = id
	if v, bad = unseal(bucketSensors, []byte(id), v); bad != nil {
		return r, bad, nil
	}
	saved, bad := decodeSpecs(v)
	if bad != nil {
		return r, bad, nil
	}
	s, err := newSensor(id)
	if err != nil || s == nil {
		if err != nil {
			err = fmt.Errorf("sensor %s: %w", id, err)
		}
		return r, nil, err
	}
	r.Sensor, r.Saved, r.Changed = s, saved, s.Windows() != len(saved)
	for i := 0; i < s.Windows() && !r.Changed; i++ {
		r.Changed = s.Spec(i) != saved[i]
	}
	prefix := appendIDPrefix(nil, id)
	*loaded = (*loaded)[:0]
	for pk, pv := pc.Seek(prefix); pk != nil && bytes.HasPrefix(pk, prefix); pk, pv = pc.Next() {
		_, key, err := splitPaneKey(pk)
		if err != nil {
			return r, err, nil
		}
		if pv, err = unseal(bucketPanes, pk, pv); err != nil {
			return r, err, nil
		}
		switch err := s.LoadPane(key, pv); {
		case err == nil:
			*loaded = append(*loaded, key)
		case errors.Is(err, rolling.ErrTooOld) || errors.Is(err, rolling.ErrBadSpec):
			r.Dropped++
			sh.cleanup.addDelete(pk)
		default:
			return r, fmt.Errorf("pane %v/%d: %w", key.Width, key.Index, err), nil
		}
	}
	// Loading a newer pane slides the older ones out of the ring, so
	// panes loaded in key order may since have left every window.
	r.Panes = len(*loaded)
	s.Horizon(func(width time.Duration, oldest int64) {
		stale := 0
		for _, key := range *loaded {
			if key.Width == width && key.Index < oldest {
				stale++
			}
		}
		if stale > 0 {
			r.Panes -= stale
			r.Dropped += stale
			sh.cleanup.addHorizon(id, width, oldest)
		}
	})
	if !r.Changed {
		s.MarkSaved() // the file holds its specs and, after cleanup, its horizon
	}
	return r, nil, nil
}

// readRestart reads the restart time of sensor k; 0 when it has none.
func readRestart(restarts *bolt.Bucket, k []byte) (int64, error) {
	v, ok, err := read8(restarts, bucketRestarts, k, "restart time")
	if !ok {
		return 0, err
	}
	return readInt(v), nil
}

// readSeq reads the stream sequence of sensor k; 0 when it has none.
func readSeq(seqs *bolt.Bucket, k []byte) (uint64, error) {
	v, ok, err := read8(seqs, bucketSeqs, k, "stream sequence")
	if !ok {
		return 0, err
	}
	return binary.BigEndian.Uint64(v), nil
}

// read8 returns the 8-byte value of key k in bucket b (named name); ok
// is false when b or the key is missing (files that never had one) or
// on error.
func read8(b *bolt.Bucket, name, k []byte, what string) (v []byte, ok bool, err error) {
	if b == nil {
		return nil, false, nil
	}
	v, err = get(b, name, k)
	switch {
	case err != nil:
		return nil, false, err
	case v == nil:
		return nil, false, nil
	case len(v) != 8:
		return nil, false, fmt.Errorf("%w: %s of %d bytes", ErrCorrupt, what, len(v))
	}
	return v, true, nil
}

// setAside makes the fresh sensor that replaces one whose stored state
// is not trusted, and queues the move of that state out of the way: its
// specs and panes, and its restart time if that was what failed (a good
// one stays, so the sensor goes on refusing readings from before its
// last calibration). A nil Sensor means newSensor left it out.
func (sh *restoreShard) setAside(id string, restart int64, restartBad bool, why error,
	newSensor func(id string) (*rolling.Sensor, error)) (Restored, error) {
	s, err := newSensor(id)
	if err != nil {
		return Restored{}, fmt.Errorf("sensor %s: %w", id, err)
	}
	if s == nil {
		return Restored{}, nil
	}
	sh.cleanup.addSetAside(id, restartBad)
	return Restored{ID: id, Sensor: s, Restart: restart, SetAside: &SensorError{Sensor: id, Err: why}}, nil
}
