package ingest_test

import (
	"errors"
	"fmt"
	"path/filepath"
	"slices"
	"testing"
	"time"
	"unsafe"

	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// dedupModel is the rule of ingest.Dedup written out over every applied
// time, with no ring: the reference the fixed-size type must agree with.
type dedupModel struct {
	applied  []int64 // every time admitted, any order
	hasFloor bool
	floor    int64
}

func (m *dedupModel) admit(t int64) bool {
	top := slices.Clone(m.applied)
	slices.Sort(top)
	if len(top) > ingest.DedupSize {
		top = top[len(top)-ingest.DedupSize:]
	}
	switch {
	case slices.Contains(top, t):
		return false
	case len(top) == ingest.DedupSize && t < top[0]:
		return false
	case len(top) < ingest.DedupSize && m.hasFloor && t <= m.floor:
		return false
	}
	m.applied = append(m.applied, t)
	return true
}

// TestDedup_MatchesRule feeds random streams (mostly in order, some
// late, some repeated, some re-sent spans) to a Dedup and to the rule
// written out over all applied times, and checks every decision agrees.
func TestDedup_MatchesRule(t *testing.T) {
	rng := newRand(t)
	for trial := range 200 {
		var d ingest.Dedup
		var m dedupModel
		if trial%4 == 0 {
			// As after a restart: a sensor whose newest stored reading
			// is at 1000 s.
			s, err := rolling.NewSensor(rolling.WindowSpec{Span: time.Hour, Pane: time.Minute})
			if err != nil {
				t.Fatal(err)
			}
			if err := s.Add(rolling.Reading{UnixNano: 1000, Value: 1}); err != nil {
				t.Fatal(err)
			}
			d.Restored(s)
			m.hasFloor, m.floor = true, 1000
		}
		next := int64(1000)
		var sent []int64
		for i := range 400 {
			var at int64
			switch r := rng.IntN(10); {
			case r < 6 || len(sent) == 0: // in order
				next += 1 + rng.Int64N(3)
				at = next
			case r < 8: // late, new or not
				at = next - rng.Int64N(40)
			case r < 9: // exact repeat of something sent
				at = sent[rng.IntN(len(sent))]
			default: // a re-sent span
				at = sent[max(0, len(sent)-30)+rng.IntN(min(30, len(sent)))]
			}
			sent = append(sent, at)
			want := m.admit(at)
			err := d.Admit(at)
			if (err == nil) != want {
				t.Fatalf("trial %d step %d: Admit(%d) = %v, rule says new=%v", trial, i, at, err, want)
			}
			var de *ingest.DuplicateError
			if err != nil && (!errors.Is(err, ingest.ErrDuplicate) || !errors.As(err, &de) || de.UnixNano != at) {
				t.Fatalf("Admit(%d) error %#v, want a *DuplicateError wrapping ErrDuplicate", at, err)
			}
		}
	}
}

// TestDedup_Size states what the duplicate check costs a sensor.
func TestDedup_Size(t *testing.T) {
	// 16 times of 8 bytes, two bytes of ring index and count, a flag and
	// the 8-byte floor, padded to 8: 16·8 + 8 + 8 = 144.
	if got := unsafe.Sizeof(ingest.Dedup{}); got != 144 {
		t.Errorf("Dedup is %d bytes, want 144", got)
	}
}

// TestService_Duplicates sends the same 960 readings twice (as a gateway
// re-sending its backfill), then again after a restart of the service,
// and checks the fit holds 960 readings, not 1920, with every repeat
// refused as duplicate.
func TestService_Duplicates(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	h := startService(t, ns.ClientURL(), dir, ingest.ModeStream)
	waitStream(t, h.nc)
	js, err := h.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	base := time.Now().Add(-20 * time.Hour).Truncate(time.Hour)
	const n = 960 // 16 hours of one reading a minute
	send := func() {
		t.Helper()
		for i := range n / 10 {
			payload := []byte{'['}
			for j := range 10 {
				if j > 0 {
					payload = append(payload, ',')
				}
				at := base.Add(time.Duration(10*i+j) * time.Minute)
				payload = fmt.Appendf(payload, `{"t":%d,"v":%d}`, at.Unix(), (10*i+j)%7)
			}
			payload = append(payload, ']')
			if _, err := js.Publish("driftfit.in.qm.dup.pt-1", payload); err != nil {
				t.Fatal(err)
			}
		}
	}
	send()
	send()
	waitFor(t, "both sends handled", func() bool { st := h.svc.Stats(); return st.Applied+st.Rejected == 2*n })
	if st := h.svc.Stats(); st.Applied != n || rejectedCount(t, h.m, "duplicate") != n {
		t.Errorf("applied %d, duplicates %v; want %d each", st.Applied, rejectedCount(t, h.m, "duplicate"), n)
	}
	h.stop()

	h = startService(t, ns.ClientURL(), dir, ingest.ModeStream)
	if js, err = h.nc.JetStream(); err != nil {
		t.Fatal(err)
	}
	waitFor(t, "sensor restored", func() bool { return h.svc.Stats().Sensors == 1 })
	send()
	waitFor(t, "third send handled", func() bool { return h.svc.Stats().Rejected == n })
	if got := rejectedCount(t, h.m, "duplicate"); got != n {
		t.Errorf("duplicates after the restart %v, want %d", got, n)
	}
	h.stop()
	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	got := -1
	err = db.Restore(func(string) (*rolling.Sensor, error) {
		return rolling.NewSensor(rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour})
	}, func(r store.Restored) error {
		got = r.Sensor.Solve(0).N
		return nil
	})
	if err != nil || got != n {
		t.Errorf("stored fit holds %d readings (%v), want %d", got, err, n)
	}
}

// BenchmarkDedup_Admit is the cost the duplicate check adds to a reading:
// in order (the common case), and late by a few places.
func BenchmarkDedup_Admit(b *testing.B) {
	b.Run("in_order", func(b *testing.B) {
		var d ingest.Dedup
		t := int64(0)
		for b.Loop() {
			t += 1e9
			if err := d.Admit(t); err != nil {
				b.Fatal(err)
			}
		}
	})
	b.Run("late_by_4", func(b *testing.B) {
		var d ingest.Dedup
		t := int64(0)
		for b.Loop() {
			// Every 8th reading arrives 4 places late: a fresh time
			// among the newest held.
			t += 8e9
			for j := range int64(8) {
				if j != 3 {
					_ = d.Admit(t + j*1e9)
				}
			}
			if err := d.Admit(t + 3e9); err != nil {
				b.Fatal(err)
			}
		}
	})
}
