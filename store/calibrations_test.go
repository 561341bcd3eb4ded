package store_test

import (
	"errors"
	"fmt"
	"testing"

	bolt "go.etcd.io/bbolt"

	"driftfit/store"
)

// TestDB_Calibrations stores calibration records of three sensors, one
// id the prefix of another, through a commit and WriteAlerts, replaces
// one, and reads them back per sensor and all, after a reopen; a record
// whose bytes changed on disk comes back as nil data and is counted.
func TestDB_Calibrations(t *testing.T) {
	db := openDB(t, tempPath(t))
	var b store.Batch
	if err := b.Alerts(store.AlertWrite{Sensor: "qm.u1", Calibrations: map[uint64][]byte{2: []byte("u1#2"), 1: []byte("u1#1")}}); err != nil {
		t.Fatal(err)
	}
	if err := b.Alerts(store.AlertWrite{Sensor: "qm.u1.pt-101", Calibrations: map[uint64][]byte{1: []byte("pt#1")}}); err != nil {
		t.Fatal(err)
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	err := db.WriteAlerts([]store.AlertWrite{
		{Sensor: "qm.u1", Calibrations: map[uint64][]byte{2: []byte("u1#2 voided"), 3: []byte("u1#3")}},
		{Sensor: "qm.u0", Calibrations: map[uint64][]byte{7: []byte("u0#7")}},
	})
	if err != nil {
		t.Fatal(err)
	}
	if err := db.WriteAlerts([]store.AlertWrite{{Sensor: "x", Calibrations: map[uint64][]byte{0: []byte("no number")}}}); err == nil {
		t.Error("WriteAlerts stored a calibration record numbered 0")
	}
	db = reopen(t, db)
	list := func(sensor string) (string, error) {
		var got []string
		err := db.Calibrations(sensor, func(id string, n uint64, data []byte) error {
			got = append(got, fmt.Sprintf("%s/%d=%s", id, n, data))
			return nil
		})
		return fmt.Sprint(got), err
	}
	for _, tc := range []struct{ sensor, want string }{
		{"qm.u1", "[qm.u1/1=u1#1 qm.u1/2=u1#2 voided qm.u1/3=u1#3]"},
		{"qm.u1.pt-101", "[qm.u1.pt-101/1=pt#1]"},
		{"qm.u9", "[]"},
		{"", "[qm.u0/7=u0#7 qm.u1/1=u1#1 qm.u1/2=u1#2 voided qm.u1/3=u1#3 qm.u1.pt-101/1=pt#1]"},
	} {
		if got, err := list(tc.sensor); err != nil || got != tc.want {
			t.Errorf("Calibrations(%q) = %s, %v; want %s", tc.sensor, got, err, tc.want)
		}
	}
	stop := errors.New("stop")
	if err := db.Calibrations("", func(string, uint64, []byte) error { return stop }); err != stop {
		t.Errorf("Calibrations with fn failing = %v, want fn's error", err)
	}

	// Damage record 2 of qm.u1 behind the store's back.
	path := db.Path()
	checkClose(t, db)
	raw, err := bolt.Open(path, 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	err = raw.Update(func(tx *bolt.Tx) error {
		return tx.Bucket([]byte("calibrations")).Put([]byte("qm.u1\x00\x00\x00\x00\x00\x00\x00\x00\x02"), []byte("u1#2 altered\x00\x00\x00\x00"))
	})
	raw.Close()
	if err != nil {
		t.Fatal(err)
	}
	db = openDB(t, path)
	got, err := list("qm.u1")
	var skipped *store.SkippedError
	if got != "[qm.u1/1=u1#1 qm.u1/2= qm.u1/3=u1#3]" || !errors.As(err, &skipped) || skipped.N != 1 || !errors.Is(err, store.ErrChecksum) {
		t.Errorf("Calibrations after damage = %s, %v; want record 2 with no data and one skipped by its checksum", got, err)
	}
}
