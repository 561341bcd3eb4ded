package store

import (
	"bytes"
	"encoding/binary"
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
// (time < before), oldest day first over all sensors, in one short write
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
		c, hc := htime.Cursor(), hist.Cursor()
		var next, prefix []byte
		for k, _ := c.First(); k != nil; k, _ = c.Seek(next) {
			next = append(append(next[:0], k...), 0) // the least key after k
			if len(k) < dayKeyMin {
				// Not a key this package writes: nothing to find with it.
				if err := c.Delete(); err != nil {
					return err
				}
				continue
			}
			day := readInt(k)
			if day >= cut {
				return nil
			}
			whole := day < math.MaxInt64-nanosPerDay && day+nanosPerDay <= cut
			end := cut
			if whole {
				end = day + nanosPerDay
			}
			prefix = append(prefix[:0], k[8:]...)
			for hk, _ := hc.Seek(prefix); hk != nil && bytes.HasPrefix(hk, prefix) && len(hk) == len(prefix)+8 &&
				readInt(hk[len(prefix):]) < end; hk, _ = hc.Seek(prefix) {
				if deleted == maxDeletes {
					more = true
					return nil
				}
				if err := hc.Delete(); err != nil {
					return err
				}
				deleted++
			}
			if whole {
				if err := deleteKey(c, next[:len(next)-1]); err != nil {
					return err
				}
			}
		}
		return nil
	})
	if err != nil {
		return 0, false, fmt.Errorf("store: prune history: %w", err)
	}
	return deleted, more, nil
}

// deleteKey deletes key k through cursor c, if it is there.
func deleteKey(c *bolt.Cursor, k []byte) error {
	if got, _ := c.Seek(k); bytes.Equal(got, k) {
		return c.Delete()
	}
	return nil
}

// keyThinned holds, in meta, how far ThinHistory got: the interval it
// thinned to (uint64 ns, BE), then the last day index key it finished.
var keyThinned = []byte("thinned")

// ThinHistory thins the fit history of the windows whose pane is
// shorter than every: of their records older than before, it keeps only
// the last of each interval of length every (by record time, intervals
// aligned on the Unix epoch: with every = 24h, UTC days). With the
// default windows and every = 24h the 1d/1h window's 24 records a day
// become one, the one that covers that whole day, while the 30d/1d
// window keeps all of its records. It deletes up to maxDeletes records
// in one short write transaction; more reports that there is more to
// thin: call again, after a pause that lets commits through, until it is
// false. Thinning walks the day index once: it notes in the file how far
// it got, and starts again from the oldest day when every changes.
// before should trail the newest records by at least every, so that the
// last record of an interval has been written when it is thinned; a
// record is deleted only when a later record of its window in the same
// interval is stored.
func (db *DB) ThinHistory(before time.Time, every time.Duration, maxDeletes int) (deleted int, more bool, err error) {
	if maxDeletes <= 0 || every <= 0 {
		return 0, false, fmt.Errorf("store: thin history: maxDeletes %d and interval %v must be positive", maxDeletes, every)
	}
	cut := unixNano(before)
	err = db.bolt.Update(func(tx *bolt.Tx) (err error) {
		deleted, more = 0, false
		meta, hist, htime := tx.Bucket(bucketMeta), tx.Bucket(bucketHistory), tx.Bucket(bucketHistTime)
		if meta == nil || hist == nil || htime == nil {
			return fmt.Errorf("%w: buckets missing", ErrCorrupt)
		}
		mark, err := get(meta, bucketMeta, keyThinned)
		if err != nil || len(mark) < 8 || binary.BigEndian.Uint64(mark) != uint64(every) {
			mark = binary.BigEndian.AppendUint64(nil, uint64(every)) // start from the oldest day
		} else {
			mark = bytes.Clone(mark)
		}
		defer func() {
			if err == nil {
				var sl sealer
				err = sl.put(meta, keyThinned, mark)
			}
		}()
		c, hc := htime.Cursor(), hist.Cursor()
		var k []byte
		if len(mark) > 8 {
			k, _ = c.Seek(append(bytes.Clone(mark[8:]), 0))
		} else {
			k, _ = c.First()
		}
		var pos, next []byte
		for ; k != nil; k, _ = c.Seek(next) {
			next = append(append(next[:0], k...), 0)
			if len(k) < dayKeyMin {
				mark = append(mark[:8], k...)
				continue
			}
			day := readInt(k)
			if day > math.MaxInt64-nanosPerDay || day+nanosPerDay > cut {
				return nil
			}
			prefix := k[8:]
			_, ws, _, perr := splitHistoryKey(append(bytes.Clone(prefix), make([]byte, 8)...))
			if perr == nil && ws.Pane < every {
				end := day + nanosPerDay
				pos = appendInt(append(pos[:0], prefix...), day)
				prefix = pos[:len(prefix)]
				for {
					hk, _ := hc.Seek(pos)
					if hk == nil || !bytes.HasPrefix(hk, prefix) || len(hk) != len(prefix)+8 {
						break
					}
					t := readInt(hk[len(prefix):])
					if t >= end {
						break
					}
					pos = append(pos[:len(prefix)], hk[len(prefix):]...)
					nk, _ := hc.Next()
					later := nk != nil && bytes.HasPrefix(nk, prefix) && len(nk) == len(prefix)+8 &&
						floorDivInt(readInt(nk[len(prefix):]), int64(every)) == floorDivInt(t, int64(every))
					if later {
						if deleted == maxDeletes {
							more = true
							return nil
						}
						if err := deleteKey(hc, pos); err != nil {
							return err
						}
						deleted++
					}
					pos = append(pos, 0)
				}
			}
			mark = append(mark[:8], k...)
		}
		return nil
	})
	if err != nil {
		return 0, false, fmt.Errorf("store: thin history: %w", err)
	}
	return deleted, more, nil
}

func floorDivInt(a, b int64) int64 {
	q := a / b
	if a%b < 0 {
		q--
	}
	return q
}
