package store

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"math"
	"strings"
	"time"

	"driftfit/rolling"
)

// MaxSensorID is the longest sensor id accepted, in bytes. bbolt keys
// may be up to 32 KiB; 4 KiB leaves room for the key suffixes and is far
// beyond any real subject token.
const MaxSensorID = 4096

// sep ends the sensor id in every composite key. It cannot occur in an
// id, so "a" + sep sorts before every key of sensor "a.b" and a prefix
// scan of one sensor never reaches another.
const sep = 0x00

// signBit maps an int64 onto a uint64 whose big-endian bytes sort in the
// int64's numeric order: −2⁶³ → 0, 0 → 2⁶³, 2⁶³−1 → 2⁶⁴−1.
const signBit = 1 << 63

func checkID(id string) error {
	switch {
	case id == "":
		return fmt.Errorf("%w: empty", ErrSensorID)
	case len(id) > MaxSensorID:
		return fmt.Errorf("%w: %d bytes, longer than %d", ErrSensorID, len(id), MaxSensorID)
	case strings.IndexByte(id, sep) >= 0:
		return fmt.Errorf("%w: %q contains the byte 0x00", ErrSensorID, id)
	}
	return nil
}

func appendInt(dst []byte, v int64) []byte {
	return binary.BigEndian.AppendUint64(dst, uint64(v)^signBit)
}

func readInt(b []byte) int64 {
	return int64(binary.BigEndian.Uint64(b) ^ signBit)
}

// appendIDPrefix appends id and the separator: the prefix of every key
// of one sensor.
func appendIDPrefix(dst []byte, id string) []byte {
	dst = append(dst, id...)
	return append(dst, sep)
}

// Pane keys: id, 0x00, width ns (uint64 BE), index (int64, sign flipped,
// BE). Within one sensor and width they sort by increasing index, the
// order LoadPane needs.
const paneSuffix = 1 + 8 + 8

func appendPanePrefix(dst []byte, id string, width time.Duration) []byte {
	dst = appendIDPrefix(dst, id)
	return binary.BigEndian.AppendUint64(dst, uint64(width))
}

func appendPaneKey(dst []byte, id string, k rolling.PaneKey) []byte {
	dst = appendPanePrefix(dst, id, k.Width)
	return appendInt(dst, k.Index)
}

// splitPaneKey parses a pane key into its sensor id bytes and pane key.
func splitPaneKey(key []byte) (id []byte, pk rolling.PaneKey, err error) {
	n := len(key) - paneSuffix
	if n < 1 || key[n] != sep || bytes.IndexByte(key[:n], sep) >= 0 {
		return nil, pk, fmt.Errorf("%w: pane key %x", ErrCorrupt, key)
	}
	w := binary.BigEndian.Uint64(key[n+1:])
	if w == 0 || w > math.MaxInt64 {
		return nil, pk, fmt.Errorf("%w: pane key %x: width %d", ErrCorrupt, key, w)
	}
	pk.Width = time.Duration(w)
	pk.Index = readInt(key[n+9:])
	return key[:n], pk, nil
}

// History keys: id, 0x00, span ns, pane ns (uint64 BE each), time of the
// record (Solution.Last, Unix ns, sign flipped, BE): per sensor and
// window in time order. The day index has one key per sensor window and
// UTC day holding records: the day's first instant (Unix ns, sign
// flipped, BE), id, 0x00, span, pane, so retention and thinning walk it
// from its start, oldest day first. One key a day instead of one a
// record: with hourly panes that is 24 times fewer keys.
const (
	windowSuffix  = 1 + 8 + 8
	historySuffix = windowSuffix + 8
	dayKeyMin     = 8 + 1 + windowSuffix
)

// nanosPerDay is the length of a UTC day of the day index, in ns.
const nanosPerDay = int64(24 * time.Hour)

// dayOf returns the first instant of the UTC day holding t (Unix ns).
func dayOf(t int64) int64 {
	d := t / nanosPerDay
	if t%nanosPerDay < 0 {
		d--
	}
	return d * nanosPerDay
}

func appendDayKey(dst []byte, t int64, id string, ws rolling.WindowSpec) []byte {
	return appendWindowPrefix(appendInt(dst, dayOf(t)), id, ws)
}

func appendWindowPrefix(dst []byte, id string, ws rolling.WindowSpec) []byte {
	dst = appendIDPrefix(dst, id)
	dst = binary.BigEndian.AppendUint64(dst, uint64(ws.Span))
	return binary.BigEndian.AppendUint64(dst, uint64(ws.Pane))
}

// splitHistoryKey parses a history key into sensor id, window and time.
func splitHistoryKey(key []byte) (id []byte, ws rolling.WindowSpec, t int64, err error) {
	n := len(key) - historySuffix
	if n < 1 || key[n] != sep || bytes.IndexByte(key[:n], sep) >= 0 {
		return nil, ws, 0, fmt.Errorf("%w: history key %x", ErrCorrupt, key)
	}
	span := binary.BigEndian.Uint64(key[n+1:])
	pane := binary.BigEndian.Uint64(key[n+9:])
	if span == 0 || pane == 0 || span > math.MaxInt64 || pane > math.MaxInt64 {
		return nil, ws, 0, fmt.Errorf("%w: history key %x: window %d/%d", ErrCorrupt, key, span, pane)
	}
	ws = rolling.WindowSpec{Span: time.Duration(span), Pane: time.Duration(pane)}
	return key[:n], ws, readInt(key[n+17:]), nil
}

// nextPrefix returns the smallest key greater than every key starting
// with p, or nil when there is none (p is all 0xff).
func nextPrefix(dst, p []byte) []byte {
	dst = append(dst[:0], p...)
	for i := len(dst) - 1; i >= 0; i-- {
		if dst[i] != 0xff {
			dst[i]++
			return dst[:i+1]
		}
	}
	return nil
}

// unixNano returns t in Unix ns, clamped to the int64 range instead of
// the undefined result time.Time.UnixNano gives outside it.
func unixNano(t time.Time) int64 {
	switch {
	case t.Before(minTime):
		return math.MinInt64
	case t.After(maxTime):
		return math.MaxInt64
	}
	return t.UnixNano()
}

var (
	minTime = time.Unix(0, math.MinInt64)
	maxTime = time.Unix(0, math.MaxInt64)
)
