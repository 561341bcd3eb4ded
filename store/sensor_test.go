package store_test

import (
	"errors"
	"slices"
	"strings"
	"testing"
	"time"

	"driftfit/rolling"
	"driftfit/store"
)

// TestDB_LoadSensor reads back one sensor at a time while the file stays
// open for writing, as the pages do beside the service: each comes back
// with the windows it was written with and fits bit for bit like the
// sensor that was committed, and lists the same panes.
func TestDB_LoadSensor(t *testing.T) {
	db := openDB(t, tempPath(t))
	specs := []rolling.WindowSpec{{Span: 6 * hour, Pane: hour}, {Span: 10 * day, Pane: day}}
	f := newFeed(t, db, 11, 3, specs)
	f.step(4000, 7*time.Minute)
	f.commit()
	for _, id := range f.ids {
		s, ok, err := db.LoadSensor(id)
		if err != nil || !ok {
			t.Fatalf("LoadSensor(%s) = %v, %v", id, ok, err)
		}
		live := f.sensors[id]
		if s.Windows() != len(specs) {
			t.Fatalf("%s: %d windows, want %d", id, s.Windows(), len(specs))
		}
		for i := range specs {
			if s.Spec(i) != specs[i] {
				t.Errorf("%s window %d: %v, want %v", id, i, s.Spec(i), specs[i])
			}
			a, b := live.Solve(i), s.Solve(i)
			if d := diffSolution(&a, &b); d != "" {
				t.Errorf("%s window %v: %s", id, specs[i], d)
			}
			if pa, pb := live.AppendPanes(nil, specs[i].Pane), s.AppendPanes(nil, specs[i].Pane); !slices.Equal(pa, pb) || len(pa) == 0 {
				t.Errorf("%s width %v: %d panes loaded, %d live, or they differ", id, specs[i].Pane, len(pb), len(pa))
			}
		}
	}
	for _, tc := range []struct {
		id      string
		ok      bool
		wantErr error
	}{
		{"plant-north.none", false, nil},
		{"", false, store.ErrSensorID},
		{"a\x00b", false, store.ErrSensorID},
	} {
		if s, ok, err := db.LoadSensor(tc.id); ok != tc.ok || s != nil || !errors.Is(err, tc.wantErr) || (err == nil) != (tc.wantErr == nil) {
			t.Errorf("LoadSensor(%q) = %v, %v, %v; want nil, %v, %v", tc.id, s, ok, err, tc.ok, tc.wantErr)
		}
	}
}

// TestDB_LoadSensor_Damaged flips a bit of one sensor's pane: that
// sensor reads back as an error naming it and matching ErrChecksum, the
// others as before; nothing is moved or deleted.
func TestDB_LoadSensor_Damaged(t *testing.T) {
	path, ids := buildFile(t, 7)
	bad := ids[1]
	off := paneValueOffset(t, path, bad)
	damaged := copyFile(t, path, func(b []byte) []byte { b[off+31] ^= 0x40; return b })
	db := openDB(t, damaged)
	for range 2 {
		for _, id := range ids {
			s, ok, err := db.LoadSensor(id)
			if id == bad {
				if err == nil || !errors.Is(err, store.ErrChecksum) || !strings.Contains(err.Error(), bad) || ok || s != nil {
					t.Errorf("LoadSensor(%s) = %v, %v; want an error naming it that matches ErrChecksum", id, ok, err)
				}
				continue
			}
			if err != nil || !ok || s.Solve(0).N == 0 {
				t.Errorf("LoadSensor(%s) = %v, %v", id, ok, err)
			}
		}
	}
}
