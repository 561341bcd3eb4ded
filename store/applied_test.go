package store_test

import (
	"testing"
	"time"

	"driftfit/rolling"
	"driftfit/store"
)

// TestDB_Commit_SeveralBatches checks that batches filled apart (as one per
// worker) commit together with the position and the applied count, and
// that all of it survives a reopen.
func TestDB_Commit_SeveralBatches(t *testing.T) {
	db := openDB(t, tempPath(t))
	t0 := time.Date(2026, 6, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	var batches [2]*store.Batch
	for i, id := range []string{"qm.u1.feed.ft-401", "qm.u2.feed.ft-402"} {
		s, err := rolling.NewSensor(rolling.WindowSpec{Span: day, Pane: hour})
		if err != nil {
			t.Fatal(err)
		}
		for j := range 10 {
			if err := s.Add(rolling.Reading{UnixNano: t0 + int64(j)*int64(10*time.Minute), Value: float64(i + j)}); err != nil {
				t.Fatal(err)
			}
		}
		batches[i] = new(store.Batch)
		if err := batches[i].Sensor(id, s); err != nil {
			t.Fatal(err)
		}
	}
	batches[0].SetPosition(42)
	batches[1].SetApplied(20)
	if _, err := db.Commit(batches[:]...); err != nil {
		t.Fatal(err)
	}
	db = reopen(t, db)
	pos, err := db.Position()
	if err != nil || pos != 42 {
		t.Errorf("Position = %d, %v, want 42", pos, err)
	}
	n, err := db.Applied()
	if err != nil || n != 20 {
		t.Errorf("Applied = %d, %v, want 20", n, err)
	}
	var ids []string
	err = db.Restore(func(string) (*rolling.Sensor, error) {
		return rolling.NewSensor(rolling.WindowSpec{Span: day, Pane: hour})
	}, func(r store.Restored) error {
		if got := r.Sensor.Solve(0).N; got != 10 {
			t.Errorf("%s restored with %d readings, want 10", r.ID, got)
		}
		ids = append(ids, r.ID)
		return nil
	})
	if err != nil || len(ids) != 2 {
		t.Errorf("Restore = %v, sensors %v, want both", err, ids)
	}
}

// TestBatch_DropPanes checks that dropping a sensor's panes and writing its
// fresh state in the same batch leaves only the fresh panes, and no other
// sensor's.
func TestBatch_DropPanes(t *testing.T) {
	db := openDB(t, tempPath(t))
	spec := rolling.WindowSpec{Span: day, Pane: hour}
	t0 := time.Date(2026, 6, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	fill := func(from, n int) *rolling.Sensor {
		s, _ := rolling.NewSensor(spec)
		for j := range n {
			_ = s.Add(rolling.Reading{UnixNano: t0 + int64(from+j)*int64(20*time.Minute), Value: float64(j)})
		}
		return s
	}
	var b store.Batch
	for _, id := range []string{"qm.a.pt-1", "qm.a.pt-10", "qm.a.pt-2"} {
		if err := b.Sensor(id, fill(0, 30)); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	if err := b.DropPanes("qm.a.pt-1"); err != nil {
		t.Fatal(err)
	}
	if err := b.Sensor("qm.a.pt-1", fill(40, 5)); err != nil {
		t.Fatal(err)
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	got := map[string]int{}
	err := db.Restore(func(string) (*rolling.Sensor, error) { return rolling.NewSensor(spec) }, func(r store.Restored) error {
		got[r.ID] = r.Sensor.Solve(0).N
		return nil
	})
	if err != nil || got["qm.a.pt-1"] != 5 || got["qm.a.pt-10"] != 30 || got["qm.a.pt-2"] != 30 {
		t.Errorf("restored readings %v (%v), want pt-1 5 and the others 30", got, err)
	}
}
