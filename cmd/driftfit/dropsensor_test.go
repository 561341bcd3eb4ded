package main

import (
	"bytes"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"driftfit/rolling"
	"driftfit/store"
)

// TestDropSensor deletes one sensor's state from a real file and checks
// what stays; refuses a missing argument, a missing file, an unknown
// sensor and a file held by another user.
func TestDropSensor(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, dbFile)
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	specs := []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}}
	t0 := time.Date(2026, 11, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	var b store.Batch
	ids := []string{"qm.u1.steam.pt-101", "qm.u1.steam.pt-102"}
	for _, id := range ids {
		s, _ := rolling.NewSensor(specs...)
		for h := range 5 {
			if h == 4 {
				sol := s.Solve(0)
				if err := b.Record(id, &sol); err != nil {
					t.Fatal(err)
				}
			}
			if err := s.Add(rolling.Reading{UnixNano: t0 + int64(h)*int64(time.Hour), Value: float64(h)}); err != nil {
				t.Fatal(err)
			}
		}
		if err := b.Sensor(id, s); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	if err := db.WriteAlerts([]store.AlertWrite{{Sensor: ids[0], State: []byte("{}")}}); err != nil {
		t.Fatal(err)
	}

	cmd := func(args ...string) (int, string, string) {
		var out, errOut bytes.Buffer
		code := run(t.Context(), append([]string{"drop-sensor"}, args...), nil, &out, &errOut)
		return code, out.String(), errOut.String()
	}
	// The test holds the file, as serve would.
	if code, _, e := cmd("--data", dir, ids[0]); code != 1 || !strings.Contains(e, "stop the service") || !strings.Contains(e, path) {
		t.Errorf("drop-sensor on a held file: exit %d, %q; want 1 and advice to stop the service", code, e)
	}
	db.Close()

	for _, tc := range []struct {
		name string
		args []string
		code int
		want string
	}{
		{"no sensor", []string{"--data", dir}, 2, "want one SENSOR"},
		{"no file", []string{"--data", filepath.Join(dir, "nowhere"), ids[0]}, 1, "no state file"},
		{"unknown sensor", []string{"--data", dir, "qm.u9.none"}, 1, "no stored state"},
		{"dropped", []string{ids[0], "--data", dir}, 0, "dropped sensor " + ids[0]},
		{"again", []string{"--data", dir, ids[0]}, 1, "no stored state"},
	} {
		code, out, e := cmd(tc.args...)
		if code != tc.code || !strings.Contains(out+e, tc.want) {
			t.Errorf("%s: exit %d, stdout %q, stderr %q; want %d and %q", tc.name, code, out, e, tc.code, tc.want)
		}
		if tc.name == "dropped" && (!strings.Contains(out, "5 panes") || !strings.Contains(out, "alert state")) {
			t.Errorf("dropped: %q %q does not say what was deleted", out, e)
		}
	}
	if fi, err := filepath.Glob(filepath.Join(dir, "nowhere", "*")); err != nil || len(fi) != 0 {
		t.Errorf("a missing data directory got files: %v", fi)
	}

	db, err = store.Open(path, store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	restored := map[string]bool{}
	err = db.Restore(func(string) (*rolling.Sensor, error) { return rolling.NewSensor(specs...) },
		func(r store.Restored) error { restored[r.ID] = true; return nil })
	if err != nil || restored[ids[0]] || !restored[ids[1]] {
		t.Errorf("restore after drop: %v, %v; want only %s", err, restored, ids[1])
	}
	n := 0
	if err := db.History(ids[0], rolling.WindowSpec{}, time.Time{}, time.Time{}, func(store.HistoryRecord) error { n++; return nil }); err != nil || n != 1 {
		t.Errorf("history of the dropped sensor: %d records, %v; want it kept", n, err)
	}
}
