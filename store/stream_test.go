package store_test

import (
	"path/filepath"
	"testing"
	"time"

	"driftfit/rolling"
	"driftfit/store"
)

// TestDB_Stream checks the stream identity round trip through a closed
// and reopened file, and that a reset sets the position to 0 with it.
func TestDB_Stream(t *testing.T) {
	path := filepath.Join(t.TempDir(), "s.db")
	db, err := store.Open(path, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	if id, err := db.Stream(); err != nil || !id.IsZero() {
		t.Fatalf("Stream() of a new file = %v, %v; want zero", id, err)
	}
	var b store.Batch
	b.SetPosition(28803)
	spec := rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour}
	sensor, err := rolling.NewSensor(spec)
	if err != nil {
		t.Fatal(err)
	}
	if err := sensor.Add(rolling.Reading{UnixNano: time.Date(2026, 11, 30, 8, 0, 0, 0, time.UTC).UnixNano(), Value: 1003.2}); err != nil {
		t.Fatal(err)
	}
	if err := b.Sensor("qm.u1.steam.pt-101", sensor); err != nil {
		t.Fatal(err)
	}
	if err := b.SetSeq("qm.u1.steam.pt-101", 28800); err != nil {
		t.Fatal(err)
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	first := store.StreamID{Name: "DRIFTFIT", Created: time.Date(2026, 11, 30, 8, 15, 0, 123456789, time.UTC)}
	if err := db.SetStream(first, false); err != nil {
		t.Fatal(err)
	}
	if pos, err := db.Position(); err != nil || pos != 28803 {
		t.Errorf("Position() after SetStream without reset = %d, %v; want 28803", pos, err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	db, err = store.Open(path, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if id, err := db.Stream(); err != nil || !id.Equal(first) {
		t.Errorf("Stream() after reopen = %v, %v; want %v", id, err, first)
	}
	second := store.StreamID{Name: "DRIFTFIT", Created: first.Created.Add(time.Nanosecond)}
	if second.Equal(first) {
		t.Fatal("identities 1 ns apart compare equal")
	}
	if err := db.SetStream(second, true); err != nil {
		t.Fatal(err)
	}
	if pos, err := db.Position(); err != nil || pos != 0 {
		t.Errorf("Position() after a reset = %d, %v; want 0", pos, err)
	}
	if id, err := db.Stream(); err != nil || !id.Equal(second) {
		t.Errorf("Stream() after a reset = %v, %v; want %v", id, err, second)
	}
	seq := uint64(1)
	err = db.Restore(func(string) (*rolling.Sensor, error) { return rolling.NewSensor(spec) }, func(r store.Restored) error {
		seq = r.Seq
		return nil
	})
	if err != nil || seq != 0 {
		t.Errorf("sensor sequence after a reset = %d (%v), want 0", seq, err)
	}
}
