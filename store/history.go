package store

import (
	"bytes"
	"fmt"
	"math"
	"time"

	bolt "go.etcd.io/bbolt"

	"driftfit/rolling"
)

// HistoryRecord is one stored fit record: the solution of one window of
// one sensor at the moment its newest pane closed. Solution.Window is the
// window and Solution.Last the record's time. Times read back come from
// time.Unix, as rolling makes them (local location); floats, ints and
// error values are exactly those recorded.
type HistoryRecord struct {
	Sensor   string
	Solution rolling.Solution
}

// History calls fn with the fit records of sensor whose time (Solution.Last)
// t satisfies since ≤ t < until, in time order. A zero window means every
// window, merged in time order (ties in window key order); a zero since
// or until leaves that end open. fn runs inside a read transaction: it
// must not call the DB's writing methods (a commit that grows the file
// waits for the read to end). An error from fn stops the walk and is
// returned as it is.
//
// A record that fails its checksum or does not decode is never handed
// to fn: the walk goes on without it and then returns a *SkippedError
// counting what was left out (matching ErrCorrupt), after fn has seen
// every good record.
func (db *DB) History(sensor string, window rolling.WindowSpec, since, until time.Time, fn func(HistoryRecord) error) error {
	if err := checkID(sensor); err != nil {
		return err
	}
	lo, hi := int64(math.MinInt64), int64(math.MaxInt64)
	if !since.IsZero() {
		lo = unixNano(since)
	}
	bounded := !until.IsZero()
	if bounded {
		hi = unixNano(until)
	}
	var fnErr error
	skip := SkippedError{What: "fit records"}
	err := db.bolt.View(func(tx *bolt.Tx) error {
		skip = SkippedError{What: "fit records"}
		bk := tx.Bucket(bucketHistory)
		if bk == nil {
			return nil
		}
		var prefixes [][]byte
		if window != (rolling.WindowSpec{}) {
			prefixes = append(prefixes, appendWindowPrefix(nil, sensor, window))
		} else {
			sp := appendIDPrefix(nil, sensor)
			c := bk.Cursor()
			var next []byte
			for k, _ := c.Seek(sp); k != nil && bytes.HasPrefix(k, sp); k, _ = c.Seek(next) {
				if len(k) != len(sp)+historySuffix-1 {
					skip.add(fmt.Errorf("%w: history key %x", ErrCorrupt, k))
					if k, _ = c.Next(); k == nil || !bytes.HasPrefix(k, sp) {
						break
					}
					next = append(next[:0], k...)
					continue
				}
				p := bytes.Clone(k[:len(sp)+16])
				prefixes = append(prefixes, p)
				if next = nextPrefix(next, p); next == nil {
					break
				}
			}
		}
		// One cursor per window, merged by time.
		type head struct {
			c      *bolt.Cursor
			prefix []byte
			k, v   []byte
		}
		heads := make([]head, 0, len(prefixes))
		seek := appendInt(nil, lo)
		for _, p := range prefixes {
			h := head{c: bk.Cursor(), prefix: p}
			h.k, h.v = h.c.Seek(append(bytes.Clone(p), seek...))
			heads = append(heads, h)
		}
		rec := HistoryRecord{Sensor: sensor}
		for {
			best, bestT := -1, int64(0)
			for i := range heads {
				h := &heads[i]
				for h.k != nil && bytes.HasPrefix(h.k, h.prefix) && len(h.k) != len(h.prefix)+8 {
					skip.add(fmt.Errorf("%w: history key %x", ErrCorrupt, h.k))
					h.k, h.v = h.c.Next()
				}
				if h.k == nil || !bytes.HasPrefix(h.k, h.prefix) {
					continue
				}
				t := readInt(h.k[len(h.prefix):])
				if bounded && t >= hi {
					continue
				}
				if best < 0 || t < bestT {
					best, bestT = i, t
				}
			}
			if best < 0 {
				return nil
			}
			h := &heads[best]
			_, ws, _, err := splitHistoryKey(h.k)
			var v []byte
			if err == nil {
				v, err = unseal(bucketHistory, h.k, h.v)
			}
			if err == nil {
				rec.Solution.Window = ws
				err = decodeRecord(v, &rec.Solution)
			}
			if err != nil {
				skip.add(fmt.Errorf("sensor %s time %d: %w", sensor, bestT, err))
			} else if fnErr = fn(rec); fnErr != nil {
				return fnErr
			}
			h.k, h.v = h.c.Next()
		}
	})
	if fnErr != nil {
		return fnErr
	}
	if err != nil {
		return fmt.Errorf("store: history of %s: %w", sensor, err)
	}
	return skip.err()
}

// HistorySensors calls fn with each sensor id that has fit records, in
// byte order. An error from fn stops the walk and is returned as it is;
// fn must not call the DB's writing methods. A sensor is named only
// from a key whose record passes its checksum, so a damaged key names
// no sensor; keys passed over so are counted in a *SkippedError returned
// at the end.
func (db *DB) HistorySensors(fn func(id string) error) error {
	var fnErr error
	skip := SkippedError{What: "fit records"}
	err := db.bolt.View(func(tx *bolt.Tx) error {
		skip = SkippedError{What: "fit records"}
		bk := tx.Bucket(bucketHistory)
		if bk == nil {
			return nil
		}
		c := bk.Cursor()
		var next []byte
		for k, v := c.First(); k != nil; k, v = c.Seek(next) {
			id, _, _, err := splitHistoryKey(k)
			if err == nil {
				_, err = unseal(bucketHistory, k, v)
			}
			if err != nil {
				skip.add(err)
				if k, _ = c.Next(); k == nil {
					break
				}
				next = append(next[:0], k...)
				continue
			}
			if fnErr = fn(string(id)); fnErr != nil {
				return fnErr
			}
			// Every key of this sensor starts with id+0x00, and all sort
			// below id+0x01; the next sensor's keys do not.
			next = append(append(next[:0], id...), sep+1)
		}
		return nil
	})
	if fnErr != nil {
		return fnErr
	}
	if err != nil {
		return fmt.Errorf("store: list history sensors: %w", err)
	}
	return skip.err()
}

// PruneHistory deletes up to maxDeletes fit records older than before
// (time < before), oldest first over all sensors, in one short write
// transaction. more reports that older records remain: call again, after
// a pause that lets commits through, until it is false. maxDeletes must
// be positive; a few hundred keep each transaction to milliseconds.
func (db *DB) PruneHistory(before time.Time, maxDeletes int) (deleted int, more bool, err error) {
	if maxDeletes <= 0 {
		return 0, false, fmt.Errorf("store: prune history: maxDeletes %d must be positive", maxDeletes)
	}
	cut := unixNano(before)
	err = db.bolt.Update(func(tx *bolt.Tx) error {
		deleted, more = 0, false
		hist, htime := tx.Bucket(bucketHistory), tx.Bucket(bucketHistTime)
		if hist == nil || htime == nil {
			return fmt.Errorf("%w: buckets missing", ErrCorrupt)
		}
		c := htime.Cursor()
		var hk []byte
		for k, _ := c.First(); k != nil; k, _ = c.First() {
			if len(k) < 8+1+windowSuffix {
				return fmt.Errorf("%w: history time key %x", ErrCorrupt, k)
			}
			if readInt(k) >= cut {
				return nil
			}
			if deleted == maxDeletes {
				more = true
				return nil
			}
			hk = append(append(hk[:0], k[8:]...), k[:8]...)
			if err := hist.Delete(hk); err != nil {
				return err
			}
			if err := c.Delete(); err != nil {
				return err
			}
			deleted++
		}
		return nil
	})
	if err != nil {
		return 0, false, fmt.Errorf("store: prune history: %w", err)
	}
	return deleted, more, nil
}
