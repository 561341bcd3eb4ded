package store

import (
	"encoding/binary"
	"fmt"
	"time"

	"driftfit/rolling"
)

// AppendHistoryRecord appends r in a self-contained binary form (sensor
// id, window, then the fit record as stored) so that records can travel
// to a process that cannot open the file, as when the service answers
// history requests over the bus. DecodeHistoryRecord reads it back bit
// for bit.
func AppendHistoryRecord(dst []byte, r *HistoryRecord) ([]byte, error) {
	if err := checkID(r.Sensor); err != nil {
		return dst, err
	}
	rec, err := appendRecord(nil, &r.Solution)
	if err != nil {
		return dst, err
	}
	dst = binary.AppendUvarint(dst, uint64(len(r.Sensor)))
	dst = append(dst, r.Sensor...)
	dst = binary.AppendUvarint(dst, uint64(r.Solution.Window.Span))
	dst = binary.AppendUvarint(dst, uint64(r.Solution.Window.Pane))
	dst = binary.AppendUvarint(dst, uint64(len(rec)))
	return append(dst, rec...), nil
}

// DecodeHistoryRecord decodes one record written by AppendHistoryRecord
// from the start of b and returns it with the count of bytes it used.
func DecodeHistoryRecord(b []byte) (HistoryRecord, int, error) {
	var r HistoryRecord
	off := 0
	next := func(what string) (uint64, error) {
		v, n := binary.Uvarint(b[off:])
		if n <= 0 {
			return 0, fmt.Errorf("%w: history record %s at byte %d", ErrCorrupt, what, off)
		}
		off += n
		return v, nil
	}
	take := func(what string, n uint64) ([]byte, error) {
		if n > uint64(len(b)-off) {
			return nil, fmt.Errorf("%w: history record %s of %d bytes, %d left", ErrCorrupt, what, n, len(b)-off)
		}
		p := b[off : off+int(n)]
		off += int(n)
		return p, nil
	}
	n, err := next("sensor length")
	if err != nil {
		return r, 0, err
	}
	id, err := take("sensor", n)
	if err != nil {
		return r, 0, err
	}
	r.Sensor = string(id)
	if err := checkID(r.Sensor); err != nil {
		return r, 0, err
	}
	span, err := next("span")
	if err != nil {
		return r, 0, err
	}
	pane, err := next("pane")
	if err != nil {
		return r, 0, err
	}
	if span > uint64(1<<63-1) || pane > uint64(1<<63-1) {
		return r, 0, fmt.Errorf("%w: history record window %d/%d out of range", ErrCorrupt, span, pane)
	}
	r.Solution.Window = rolling.WindowSpec{Span: time.Duration(span), Pane: time.Duration(pane)}
	if n, err = next("length"); err != nil {
		return r, 0, err
	}
	rec, err := take("fit record", n)
	if err != nil {
		return r, 0, err
	}
	if err := decodeRecord(rec, &r.Solution); err != nil {
		return r, 0, err
	}
	return r, off, nil
}
