package store

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"maps"
	"slices"
	"time"

	bolt "go.etcd.io/bbolt"
)

// Buckets of the alert side, created on first write:
//
//	alerts   sensor id → the caller's alert state for the sensor (opaque)
//	events   time(i64) seq(u64) → one event (opaque, JSON in practice)
//	tickets  ticket id → the ticket's latest version (opaque)
//	outbox   lane(u8) seq(u64) → a delivery still to make (opaque); keys
//	         of 8 bytes (no lane), written by earlier versions, are read
//	         as lane 0
//	calibrations  id 0x00 number(u64) → one calibration record of the
//	         sensor (opaque); made with its first key
var (
	bucketAlerts       = []byte("alerts")
	bucketEvents       = []byte("events")
	bucketTickets      = []byte("tickets")
	bucketOutbox       = []byte("outbox")
	bucketCalibrations = []byte("calibrations")
)

// AlertWrite is what one sensor's alert evaluation changed. Nil fields
// leave the stored value alone.
type AlertWrite struct {
	Sensor string
	State  []byte // the sensor's alert state
	Events []TimedValue
	// Tickets maps ticket id to the ticket's latest version.
	Tickets map[string][]byte
	// Outbox holds deliveries to make (e.g. bus publications, webhook
	// posts); their Seq is assigned when they are stored.
	Outbox []OutboxItem
	// Calibrations maps a calibration record's number (from 1) to the
	// record, which replaces any stored under that number of Sensor.
	Calibrations map[uint64][]byte
}

// TimedValue is a value filed under a time.
type TimedValue struct {
	At   time.Time
	Data []byte
}

// OutboxItem is a delivery still to make. Lane says which deliverer takes
// it (the store does not interpret it); Seq identifies it within its lane
// to OutboxDone and grows with every item stored.
type OutboxItem struct {
	Lane byte
	Seq  uint64
	Data []byte
}

// WriteAlerts stores the writes in one transaction (with fsync unless
// Options.NoSync), so a sensor's alert state never gets ahead of the
// events and tickets it produced, and a ticket is in the outbox exactly
// when it is stored. A running service puts its alert writes into its
// commit batches instead (Batch.Alerts), so they land with the state
// they derive from; WriteAlerts is for tools working on a file alone.
func (db *DB) WriteAlerts(ws []AlertWrite) error {
	if len(ws) == 0 {
		return nil
	}
	err := db.bolt.Update(func(tx *bolt.Tx) error {
		var st CommitStats
		return writeAlerts(tx, ws, &st)
	})
	if err != nil {
		return fmt.Errorf("store: write alerts: %w", err)
	}
	return nil
}

// writeAlerts puts the writes into tx, listing the outbox items it
// stored (with their Seq, data copied) in st.Outbox.
func writeAlerts(tx *bolt.Tx, ws []AlertWrite, st *CommitStats) error {
	var bks [4]*bolt.Bucket
	for i, name := range [][]byte{bucketAlerts, bucketEvents, bucketTickets, bucketOutbox} {
		b, err := tx.CreateBucketIfNotExists(name)
		if err != nil {
			return err
		}
		bks[i] = b
	}
	alerts, events, tickets, outbox := bks[0], bks[1], bks[2], bks[3]
	for _, w := range ws {
		if err := checkID(w.Sensor); err != nil {
			return err
		}
		if w.State != nil {
			if err := st.put(alerts, []byte(w.Sensor), w.State); err != nil {
				return err
			}
		}
		for _, e := range w.Events {
			seq, err := events.NextSequence()
			if err != nil {
				return err
			}
			key := appendInt(nil, unixNano(e.At))
			key = binary.BigEndian.AppendUint64(key, seq)
			if err := st.put(events, key, e.Data); err != nil {
				return err
			}
		}
		for id, data := range w.Tickets {
			if id == "" {
				return fmt.Errorf("%w: empty ticket id", ErrRecord)
			}
			if err := st.put(tickets, []byte(id), data); err != nil {
				return err
			}
		}
		if err := putCalibrations(tx, w, st); err != nil {
			return err
		}
		for _, it := range w.Outbox {
			if it.Lane == 0 {
				return fmt.Errorf("%w: outbox lane 0 is for items of earlier versions", ErrRecord)
			}
			seq, err := outbox.NextSequence()
			if err != nil {
				return err
			}
			if err := st.put(outbox, outboxKey(it.Lane, seq), it.Data); err != nil {
				return err
			}
			st.Outbox = append(st.Outbox, OutboxItem{Lane: it.Lane, Seq: seq, Data: append([]byte(nil), it.Data...)})
		}
	}
	return nil
}

// putCalibrations puts the calibration records of w, in number order.
func putCalibrations(tx *bolt.Tx, w AlertWrite, st *CommitStats) error {
	if len(w.Calibrations) == 0 {
		return nil
	}
	bk, err := tx.CreateBucketIfNotExists(bucketCalibrations)
	if err != nil {
		return err
	}
	for _, n := range slices.Sorted(maps.Keys(w.Calibrations)) {
		if n == 0 {
			return fmt.Errorf("%w: calibration number 0 of %s", ErrRecord, w.Sensor)
		}
		if err := st.put(bk, binary.BigEndian.AppendUint64(appendIDPrefix(nil, w.Sensor), n), w.Calibrations[n]); err != nil {
			return err
		}
	}
	return nil
}

// Calibrations calls fn with the stored calibration records of sensor
// (of every sensor when sensor is ""), by sensor id and then number. The
// bytes are valid only during the call. A record that fails its checksum
// is passed with data nil, so that a caller numbering records sees every
// number taken, and is counted in a *SkippedError returned at the end;
// an error from fn stops the walk and is returned as it is.
func (db *DB) Calibrations(sensor string, fn func(sensor string, n uint64, data []byte) error) error {
	var prefix []byte
	if sensor != "" {
		if err := checkID(sensor); err != nil {
			return err
		}
		prefix = appendIDPrefix(nil, sensor)
	}
	skip := SkippedError{What: "calibration records"}
	err := db.bolt.View(func(tx *bolt.Tx) error {
		skip = SkippedError{What: "calibration records"}
		bk := tx.Bucket(bucketCalibrations)
		if bk == nil {
			return nil
		}
		c := bk.Cursor()
		for k, v := c.Seek(prefix); k != nil && bytes.HasPrefix(k, prefix); k, v = c.Next() {
			n := len(k) - 9
			if n < 1 || k[n] != sep || bytes.IndexByte(k[:n], sep) >= 0 {
				return fmt.Errorf("%w: calibration key %x", ErrCorrupt, k)
			}
			data, err := unseal(bucketCalibrations, k, v)
			if err != nil {
				skip.add(err)
				data = nil
			}
			if err := fn(string(k[:n]), binary.BigEndian.Uint64(k[n+1:]), data); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return err
	}
	return skip.err()
}

// outboxKey is lane(u8) seq(u64), or seq(u64) alone for lane 0.
func outboxKey(lane byte, seq uint64) []byte {
	if lane == 0 {
		return binary.BigEndian.AppendUint64(nil, seq)
	}
	return binary.BigEndian.AppendUint64([]byte{lane}, seq)
}

// AlertStates calls fn with every sensor's stored alert state, in id order.
// The bytes are valid only during the call. A state that fails its
// checksum is not handed to fn; the walk goes on and returns a
// *SkippedError counting such states at the end.
func (db *DB) AlertStates(fn func(sensor string, state []byte) error) error {
	return db.forEachSealed(bucketAlerts, "alert states", func(k, v []byte) error { return fn(string(k), v) })
}

// forEachSealed calls fn with every key and unsealed value of bucket
// name, skipping (and counting in a *SkippedError) values that fail
// their checksum. An error from fn stops the walk and is returned as it is.
func (db *DB) forEachSealed(name []byte, what string, fn func(k, v []byte) error) error {
	skip := SkippedError{What: what}
	err := db.bolt.View(func(tx *bolt.Tx) error {
		skip = SkippedError{What: what}
		b := tx.Bucket(name)
		if b == nil {
			return nil
		}
		return b.ForEach(func(k, v []byte) error {
			v, err := unseal(name, k, v)
			if err != nil {
				skip.add(err)
				return nil
			}
			return fn(k, v)
		})
	})
	if err != nil {
		return err
	}
	return skip.err()
}

// Events calls fn with the stored events filed at since ≤ t < until (zero:
// open end), in time order. The bytes are valid only during the call.
// Events that fail their checksum are skipped and counted in a
// *SkippedError returned at the end.
func (db *DB) Events(since, until time.Time, fn func(at time.Time, data []byte) error) error {
	skip := SkippedError{What: "alert events"}
	err := db.bolt.View(func(tx *bolt.Tx) error {
		skip = SkippedError{What: "alert events"}
		b := tx.Bucket(bucketEvents)
		if b == nil {
			return nil
		}
		c := b.Cursor()
		var k, v []byte
		if since.IsZero() {
			k, v = c.First()
		} else {
			k, v = c.Seek(appendInt(nil, unixNano(since)))
		}
		for ; k != nil; k, v = c.Next() {
			if len(k) != 16 {
				return fmt.Errorf("%w: event key %x", ErrCorrupt, k)
			}
			at := readInt(k)
			if !until.IsZero() && at >= unixNano(until) {
				return nil
			}
			v, err := unseal(bucketEvents, k, v)
			if err != nil {
				skip.add(err)
				continue
			}
			if err := fn(time.Unix(0, at), v); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return err
	}
	return skip.err()
}

// Tickets calls fn with every stored ticket, in id order. The bytes are
// valid only during the call. Tickets that fail their checksum are
// skipped and counted in a *SkippedError returned at the end.
func (db *DB) Tickets(fn func(id string, data []byte) error) error {
	return db.forEachSealed(bucketTickets, "tickets", func(k, v []byte) error { return fn(string(k), v) })
}

// Outbox returns up to n pending deliveries of lane with Seq > after,
// oldest first, copied out. Lane 0 holds the items of earlier versions,
// which stored no lane (keys of 8 bytes: seq); lanes written now are 1
// to 255. An item that fails its checksum is left out (OutboxDone
// removes it) and counted in a *SkippedError returned with the good
// items.
func (db *DB) Outbox(lane byte, after uint64, n int) ([]OutboxItem, error) {
	var out []OutboxItem
	skip := SkippedError{What: "outbox items"}
	err := db.bolt.View(func(tx *bolt.Tx) error {
		out, skip = out[:0], SkippedError{What: "outbox items"}
		b := tx.Bucket(bucketOutbox)
		if b == nil {
			return nil
		}
		c := b.Cursor()
		for k, v := c.Seek(outboxKey(lane, after+1)); k != nil && len(out) < n; k, v = c.Next() {
			if len(k) != 8 && len(k) != 9 {
				return fmt.Errorf("%w: outbox key %x", ErrCorrupt, k)
			}
			kl, seq := byte(0), k
			if len(k) == 9 {
				kl, seq = k[0], k[1:]
			}
			if kl != lane {
				break
			}
			v, err := unseal(bucketOutbox, k, v)
			if err != nil {
				skip.add(fmt.Errorf("outbox item %d of lane %d: %w", binary.BigEndian.Uint64(seq), lane, err))
				continue
			}
			out = append(out, OutboxItem{Lane: lane, Seq: binary.BigEndian.Uint64(seq), Data: append([]byte(nil), v...)})
		}
		return nil
	})
	if err != nil {
		return out, err
	}
	return out, skip.err()
}

// OutboxDone deletes a delivered item. A running service deletes through
// its commits instead (Batch.OutboxDone).
func (db *DB) OutboxDone(lane byte, seq uint64) error {
	return db.bolt.Update(func(tx *bolt.Tx) error {
		return deleteOutbox(tx, lane, seq)
	})
}

func deleteOutbox(tx *bolt.Tx, lane byte, seq uint64) error {
	b := tx.Bucket(bucketOutbox)
	if b == nil {
		return nil
	}
	return b.Delete(outboxKey(lane, seq))
}
