package ingest

import (
	"fmt"
	"time"

	"driftfit/rolling"
)

// DedupSize is how many applied reading times a Dedup remembers.
const DedupSize = 16

// Dedup refuses readings of one sensor that repeat readings already
// applied, in a fixed 144 bytes a sensor. The rule:
//
//   - a reading newer than every applied one is new;
//   - a reading whose time equals one of the DedupSize newest applied
//     times is a repeat;
//   - a reading older than the DedupSize newest applied times is refused
//     too: with no record of the times before them, it cannot be told
//     from a repeat, and a re-sent span (a gateway's backfill sent again)
//     is exactly such readings;
//   - after a restart of the service (Restored), the sensor's newest
//     stored time is a floor: readings at or before it are refused, for
//     the same reason, until DedupSize newer ones have been applied.
//
// So a late reading is accepted as long as fewer than DedupSize newer
// readings of its sensor were applied before it: out-of-order delivery
// of a few readings passes, a repeat never counts twice. Readings that
// come in order, by far the common case, cost one comparison.
//
// This follows the watermark idea of stream processing (T. Akidau et al.,
// "The Dataflow Model", PVLDB 8(12), 2015): an event-time bound behind
// which input is no longer taken, here the DedupSize-th newest time.
//
// The zero value accepts everything until it has seen readings. A Dedup is
// not safe for concurrent use; the sensor's worker owns it.
type Dedup struct {
	// times is a ring of the n newest applied times, ascending from
	// times[head].
	times [DedupSize]int64
	head  uint8
	n     uint8
	// floor, when hasFloor, refuses readings at or before it.
	hasFloor bool
	floor    int64
}

// DuplicateError is returned by Dedup.Admit. It unwraps to ErrDuplicate.
type DuplicateError struct {
	UnixNano int64
	// Repeat is true for a time equal to an applied reading's, false for
	// one older than every time remembered.
	Repeat bool
}

func (e *DuplicateError) Error() string {
	t := time.Unix(0, e.UnixNano).UTC().Format(time.RFC3339Nano)
	if e.Repeat {
		return fmt.Sprintf("ingest: reading at %s repeats one already applied", t)
	}
	return fmt.Sprintf("ingest: reading at %s is older than the sensor's %d newest applied readings: taken for a repeat", t, DedupSize)
}

// Unwrap returns ErrDuplicate.
func (e *DuplicateError) Unwrap() error { return ErrDuplicate }

func (d *Dedup) at(i int) int64 { return d.times[(int(d.head)+i)%DedupSize] }

// Admit decides whether a reading at unixNano is new. If so it records
// the time and returns nil; otherwise it returns a *DuplicateError and
// records nothing.
func (d *Dedup) Admit(unixNano int64) error {
	if d.n > 0 && unixNano > d.at(int(d.n)-1) {
		d.push(unixNano)
		return nil
	}
	if d.n == 0 {
		if d.hasFloor && unixNano <= d.floor {
			return &DuplicateError{UnixNano: unixNano}
		}
		d.push(unixNano)
		return nil
	}
	// At or before the newest: find its place among the times held.
	i := int(d.n) - 1
	for ; i >= 0 && d.at(i) > unixNano; i-- {
	}
	switch {
	case i >= 0 && d.at(i) == unixNano:
		return &DuplicateError{UnixNano: unixNano, Repeat: true}
	case i < 0 && (d.n == DedupSize || d.hasFloor && unixNano <= d.floor):
		return &DuplicateError{UnixNano: unixNano}
	}
	// A late reading that is new: insert after position i.
	if d.n == DedupSize {
		if i < 0 {
			panic("ingest: dedup insert below a full ring") // excluded above
		}
		// Drop the oldest, shifting the ones up to i down one slot.
		for j := 0; j < i; j++ {
			d.times[(int(d.head)+j)%DedupSize] = d.at(j + 1)
		}
		d.times[(int(d.head)+i)%DedupSize] = unixNano
		return nil
	}
	for j := int(d.n); j > i+1; j-- {
		d.times[(int(d.head)+j)%DedupSize] = d.at(j - 1)
	}
	d.times[(int(d.head)+i+1)%DedupSize] = unixNano
	d.n++
	return nil
}

// push appends a time newer than all held, dropping the oldest when full.
func (d *Dedup) push(t int64) {
	if d.n < DedupSize {
		d.times[(int(d.head)+int(d.n))%DedupSize] = t
		d.n++
		return
	}
	d.times[d.head] = t
	d.head = (d.head + 1) % DedupSize
}

// admit applies the sensor's duplicate check unless
// Options.AcceptDuplicates turns it off. The sensor's worker calls it.
func (s *Service) admit(st *sensorState, unixNano int64) error {
	if s.o.AcceptDuplicates {
		return nil
	}
	return st.dedup.Admit(unixNano)
}

// Restored sets the floor from a sensor restored from the store: its
// newest reading in any window. A sensor with no readings sets none.
func (d *Dedup) Restored(s *rolling.Sensor) {
	for i := range s.Windows() {
		if t, ok := s.Newest(i); ok && (!d.hasFloor || t.UnixNano() > d.floor) {
			d.hasFloor, d.floor = true, t.UnixNano()
		}
	}
}
