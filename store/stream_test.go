package store_test

import (
	"path/filepath"
	"testing"
	"time"

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
}
