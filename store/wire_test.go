package store_test

import (
	"bytes"
	"testing"
	"time"

	"driftfit/rolling"
	"driftfit/store"
)

func wireSample(t testing.TB) store.HistoryRecord {
	s, err := rolling.NewSensor(rolling.WindowSpec{Span: day, Pane: hour})
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Date(2026, 7, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	for i := range 40 {
		_ = s.Add(rolling.Reading{UnixNano: t0 + int64(i)*int64(17*time.Minute), Value: 3 + 0.01*float64(i*i%7)})
	}
	return store.HistoryRecord{Sensor: "qm.u1.feed.tt-201", Solution: s.Solve(0)}
}

// TestHistoryRecord_Wire checks the round trip of two records back to
// back, bit for bit (re-encoding gives the same bytes).
func TestHistoryRecord_Wire(t *testing.T) {
	r := wireSample(t)
	b, err := store.AppendHistoryRecord(nil, &r)
	if err != nil {
		t.Fatal(err)
	}
	b, err = store.AppendHistoryRecord(b, &r)
	if err != nil {
		t.Fatal(err)
	}
	for off := 0; off < len(b); {
		got, n, err := store.DecodeHistoryRecord(b[off:])
		if err != nil {
			t.Fatal(err)
		}
		again, _ := store.AppendHistoryRecord(nil, &got)
		if !bytes.Equal(again, b[off:off+n]) || got.Sensor != r.Sensor || got.Solution.Window != r.Solution.Window {
			t.Fatalf("record at %d does not round-trip", off)
		}
		off += n
	}
}

func FuzzDecodeHistoryRecord(f *testing.F) {
	r := wireSample(f)
	b, _ := store.AppendHistoryRecord(nil, &r)
	f.Add(b)
	f.Add([]byte{0})
	f.Fuzz(func(t *testing.T, b []byte) {
		got, n, err := store.DecodeHistoryRecord(b)
		if err != nil {
			return
		}
		again, err := store.AppendHistoryRecord(nil, &got)
		if err != nil || !bytes.Equal(again, b[:n]) {
			t.Fatalf("accepted record does not re-encode to its bytes: %v", err)
		}
	})
}
