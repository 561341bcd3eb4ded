package store

import (
	"encoding/binary"
	"errors"
	"math"
	"path/filepath"
	"testing"
	"time"

	"driftfit/rolling"
)

// TestCommit_BadPaneSetAside commits two sensors, one of them with a pane
// that rolling.LoadPane refuses: the commit lands for the good one and
// names the bad one, whose file state — panes and stream sequence — stays
// at its last good commit, so the file restores exactly. rolling's own
// Add cannot make such a pane today (it refuses values beyond ±1e145 and
// fuzzes that every pane it writes loads again), so the pane is damaged
// in the batch between the snapshot and the check that Batch.Sensor runs
// on it, as a bug in the pane code would damage it.
func TestCommit_BadPaneSetAside(t *testing.T) {
	db, err := Open(filepath.Join(t.TempDir(), "state.db"), Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { db.Close() })
	specs := []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}, {Span: 720 * time.Hour, Pane: 24 * time.Hour}}
	t0 := time.Date(2031, 6, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	good, _ := rolling.NewSensor(specs...)
	bad, _ := rolling.NewSensor(specs...)
	add := func(s *rolling.Sensor, at int64, v float64) {
		t.Helper()
		if err := s.Add(rolling.Reading{UnixNano: at, Value: v}); err != nil {
			t.Fatal(err)
		}
	}
	for i := range 5 {
		add(good, t0+int64(i)*int64(time.Minute), float64(i))
		add(bad, t0+int64(i)*int64(time.Minute), float64(i))
	}
	var b Batch
	for id, s := range map[string]*rolling.Sensor{"qm.good": good, "qm.bad": bad} {
		if err := b.Sensor(id, s); err != nil {
			t.Fatal(err)
		}
		if err := b.SetSeq(id, 1); err != nil {
			t.Fatal(err)
		}
	}
	if st, err := db.Commit(&b); err != nil || len(st.SetAside) != 0 {
		t.Fatalf("first commit: %v, set aside %v", err, st.SetAside)
	}
	before := bad.Solve(0)

	t1 := t0 + int64(2*time.Hour)
	add(good, t1, 9)
	add(bad, t1, 9)
	if err := b.Sensor("qm.good", good); err != nil {
		t.Fatal(err)
	}
	m := b.mark()
	b.snapshot("qm.bad", bad)
	damaged := 0
	for _, o := range b.ops[m.ops:] {
		if o.kind == opPane {
			// The second sum of the pane (rolling.AppendPane: tmin, tmax,
			// n, npos, then the sums from byte 24) made NaN.
			binary.LittleEndian.PutUint64(b.bytes(o.val)[32:], math.Float64bits(math.NaN()))
			damaged++
		}
	}
	if damaged == 0 {
		t.Fatal("no pane of qm.bad in the snapshot")
	}
	b.settle("qm.bad", bad, m)
	for _, id := range []string{"qm.good", "qm.bad"} {
		if err := b.SetSeq(id, 2); err != nil {
			t.Fatal(err)
		}
	}
	b.SetPosition(1) // below the sequences, which are then written
	st, err := db.Commit(&b)
	if err != nil {
		t.Fatalf("Commit: %v", err)
	}
	if len(st.SetAside) != 1 || st.SetAside[0].Sensor != "qm.bad" || !errors.Is(st.SetAside[0], rolling.ErrBadPane) || !errors.Is(st.SetAside[0], ErrSetAside) {
		t.Fatalf("SetAside = %v, want qm.bad for rolling.ErrBadPane", st.SetAside)
	}
	if pos, _ := db.Position(); pos != 1 {
		t.Errorf("Position() = %d, want 1: the rest of the commit lands", pos)
	}
	got := map[string]Restored{}
	err = db.Restore(func(string) (*rolling.Sensor, error) { return rolling.NewSensor(specs...) },
		func(r Restored) error { got[r.ID] = r; return nil })
	if err != nil {
		t.Fatalf("Restore: %v", err)
	}
	if g, w := got["qm.good"].Sensor.Solve(0), good.Solve(0); !sameSolutionBits(&g, &w) {
		t.Errorf("good sensor restored with another fit")
	}
	if r := got["qm.bad"]; r.SetAside != nil {
		t.Errorf("bad sensor set aside at restore: %v", r.SetAside)
	} else if s := r.Sensor.Solve(0); !sameSolutionBits(&s, &before) {
		t.Errorf("bad sensor restored with another fit than its last good commit's")
	}
	// The bad sensor's state holds message 1, not 2: a restart must feed
	// it message 2 again.
	if g, b := got["qm.good"].Seq, got["qm.bad"].Seq; g != 2 || b != 1 {
		t.Errorf("stored sequences: good %d, bad %d; want 2 and 1", g, b)
	}
	// Its changes stay pending: the next snapshot holds them again.
	n := 0
	bad.Changed(func(rolling.PaneKey) { n++ })
	if n == 0 {
		t.Error("set-aside sensor has no changed panes left to write")
	}
}

// TestBatch_CheckPanes refuses, with the error LoadPane gives, the pane
// kinds Restore would refuse.
func TestBatch_CheckPanes(t *testing.T) {
	s, _ := rolling.NewSensor(rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour})
	for i := range 3 {
		if err := s.Add(rolling.Reading{UnixNano: int64(i) * int64(time.Minute), Value: float64(i)}); err != nil {
			t.Fatal(err)
		}
	}
	for _, tc := range []struct {
		name string
		edit func([]byte) []byte
		ok   bool
	}{
		{"as written", func(b []byte) []byte { return b }, true},
		{"infinite sum", func(b []byte) []byte {
			binary.LittleEndian.PutUint64(b[24:], math.Float64bits(math.Inf(1)))
			return b
		}, false},
		{"short", func(b []byte) []byte { return b[:len(b)-8] }, false},
		{"no readings", func(b []byte) []byte { binary.LittleEndian.PutUint32(b[16:], 0); return b }, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var b Batch
			b.snapshot("qm.x", s)
			for i := range b.ops {
				if o := &b.ops[i]; o.kind == opPane {
					v := tc.edit(append([]byte(nil), b.bytes(o.val)...))
					o.val = b.appendKey(func(dst []byte) []byte { return append(dst, v...) })
				}
			}
			err := b.checkPanes(s, b.ops)
			if tc.ok != (err == nil) || !tc.ok && !errors.Is(err, rolling.ErrBadPane) {
				t.Errorf("checkPanes = %v, want ok %v (or rolling.ErrBadPane)", err, tc.ok)
			}
		})
	}
}
