package store

import (
	"encoding/binary"
	"fmt"
	"time"

	bolt "go.etcd.io/bbolt"
)

// Buckets of the alert side, created on first write:
//
//	alerts   sensor id → the caller's alert state for the sensor (opaque)
//	events   time(i64) seq(u64) → one event (opaque, JSON in practice)
//	tickets  ticket id → the ticket's latest version (opaque)
//	outbox   seq(u64) → a delivery still to make (opaque)
var (
	bucketAlerts  = []byte("alerts")
	bucketEvents  = []byte("events")
	bucketTickets = []byte("tickets")
	bucketOutbox  = []byte("outbox")
)

// AlertWrite is what one sensor's alert evaluation changed. Nil fields
// leave the stored value alone.
type AlertWrite struct {
	Sensor string
	State  []byte // the sensor's alert state
	Events []TimedValue
	// Tickets maps ticket id to the ticket's latest version.
	Tickets map[string][]byte
	// Outbox holds deliveries to make (e.g. webhook posts).
	Outbox [][]byte
}

// TimedValue is a value filed under a time.
type TimedValue struct {
	At   time.Time
	Data []byte
}

// OutboxItem is a delivery still to make; Seq identifies it to OutboxDone.
type OutboxItem struct {
	Seq  uint64
	Data []byte
}

// WriteAlerts stores the writes in one transaction (with fsync unless
// Options.NoSync), so a sensor's alert state never gets ahead of the
// events and tickets it produced, and a ticket is in the outbox exactly
// when it is stored.
func (db *DB) WriteAlerts(ws []AlertWrite) error {
	if len(ws) == 0 {
		return nil
	}
	err := db.bolt.Update(func(tx *bolt.Tx) error {
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
				if err := alerts.Put([]byte(w.Sensor), w.State); err != nil {
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
				if err := events.Put(key, e.Data); err != nil {
					return err
				}
			}
			for id, data := range w.Tickets {
				if id == "" {
					return fmt.Errorf("%w: empty ticket id", ErrRecord)
				}
				if err := tickets.Put([]byte(id), data); err != nil {
					return err
				}
			}
			for _, data := range w.Outbox {
				seq, err := outbox.NextSequence()
				if err != nil {
					return err
				}
				if err := outbox.Put(binary.BigEndian.AppendUint64(nil, seq), data); err != nil {
					return err
				}
			}
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("store: write alerts: %w", err)
	}
	return nil
}

// AlertStates calls fn with every sensor's stored alert state, in id order.
// The bytes are valid only during the call.
func (db *DB) AlertStates(fn func(sensor string, state []byte) error) error {
	return db.bolt.View(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucketAlerts)
		if b == nil {
			return nil
		}
		return b.ForEach(func(k, v []byte) error { return fn(string(k), v) })
	})
}

// Events calls fn with the stored events filed at since ≤ t < until (zero:
// open end), in time order. The bytes are valid only during the call.
func (db *DB) Events(since, until time.Time, fn func(at time.Time, data []byte) error) error {
	return db.bolt.View(func(tx *bolt.Tx) error {
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
			if err := fn(time.Unix(0, at), v); err != nil {
				return err
			}
		}
		return nil
	})
}

// Tickets calls fn with every stored ticket, in id order. The bytes are
// valid only during the call.
func (db *DB) Tickets(fn func(id string, data []byte) error) error {
	return db.bolt.View(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucketTickets)
		if b == nil {
			return nil
		}
		return b.ForEach(func(k, v []byte) error { return fn(string(k), v) })
	})
}

// Outbox returns up to n pending deliveries, oldest first, copied out.
func (db *DB) Outbox(n int) ([]OutboxItem, error) {
	var out []OutboxItem
	err := db.bolt.View(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucketOutbox)
		if b == nil {
			return nil
		}
		c := b.Cursor()
		for k, v := c.First(); k != nil && len(out) < n; k, v = c.Next() {
			if len(k) != 8 {
				return fmt.Errorf("%w: outbox key %x", ErrCorrupt, k)
			}
			out = append(out, OutboxItem{Seq: binary.BigEndian.Uint64(k), Data: append([]byte(nil), v...)})
		}
		return nil
	})
	return out, err
}

// OutboxDone deletes a delivered item.
func (db *DB) OutboxDone(seq uint64) error {
	return db.bolt.Update(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucketOutbox)
		if b == nil {
			return nil
		}
		return b.Delete(binary.BigEndian.AppendUint64(nil, seq))
	})
}
