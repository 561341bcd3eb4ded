package main

import (
	"encoding/json"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/store"
)

// TestAlertsAndTickets_List fills a state file with events and tickets and
// checks the listings: filters by sensor pattern and time, --open, and the
// formats.
func TestAlertsAndTickets_List(t *testing.T) {
	path := filepath.Join(t.TempDir(), "state.db")
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Date(2026, 11, 1, 0, 0, 0, 0, time.UTC)
	ev := func(sensor string, typ alert.EventType, h int) store.TimedValue {
		e := alert.Event{Type: typ, Sensor: sensor, Window: "30d/1d", Kind: alert.Slope, Severity: alert.Warning,
			At: t0.Add(time.Duration(h) * time.Hour), Value: 0.12, CI: [2]float64{0.1, 0.14}, Limit: 0.1, Unit: "kPa/d", N: 300, Caution: alert.Caution}
		b, _ := json.Marshal(e)
		return store.TimedValue{At: e.At, Data: b}
	}
	tk := func(sensor string, h int, closed bool) []byte {
		k := alert.Ticket{ID: sensor + "@x", Sensor: sensor, Opened: t0.Add(time.Duration(h) * time.Hour), Due: t0.Add(time.Duration(100-h) * time.Hour), Reason: alert.Slope, Caution: alert.Caution}
		if closed {
			k.Calibration = &alert.Calibration{Time: t0.Add(200 * time.Hour), AsFound: 1, AsLeft: 0}
		}
		b, _ := json.Marshal(k)
		return b
	}
	err = db.WriteAlerts([]store.AlertWrite{
		{Sensor: "qm.u1.steam.pt-102", Events: []store.TimedValue{ev("qm.u1.steam.pt-102", alert.Raised, 1)},
			Tickets: map[string][]byte{"qm.u1.steam.pt-102@x": tk("qm.u1.steam.pt-102", 1, false)}},
		{Sensor: "qm.u2.feed.tt-201", Events: []store.TimedValue{ev("qm.u2.feed.tt-201", alert.Raised, 2), ev("qm.u2.feed.tt-201", alert.Cleared, 30)},
			Tickets: map[string][]byte{"qm.u2.feed.tt-201@x": tk("qm.u2.feed.tt-201", 2, true)}},
	})
	if err != nil {
		t.Fatal(err)
	}
	db.Close()

	cases := []struct {
		args []string
		want []string // substrings, in order, each on its own line
		not  []string
	}{
		{[]string{"alerts", "--db", path}, []string{"raised   qm.u1.steam.pt-102", "raised   qm.u2.feed.tt-201", "cleared  qm.u2.feed.tt-201", alert.Caution}, nil},
		{[]string{"alerts", "--db", path, "--open"}, []string{"qm.u1.steam.pt-102"}, []string{"tt-201"}},
		{[]string{"alerts", "--db", path, "--sensor", "qm.u2.*", "--format", "csv"}, []string{"at,type,sensor", "raised,qm.u2.feed.tt-201", "cleared,qm.u2.feed.tt-201"}, []string{"pt-102"}},
		{[]string{"alerts", "--db", path, "--since", "2026-11-01T12:00:00Z", "--format", "json"}, []string{`"type":"cleared"`}, []string{`"type":"raised"`}},
		{[]string{"tickets", "--db", path}, []string{"qm.u2.feed.tt-201", "closed 2026-11-09", "qm.u1.steam.pt-102", "open"}, nil},
		{[]string{"tickets", "--db", path, "--open", "--format", "json"}, []string{`"sensor":"qm.u1.steam.pt-102"`}, []string{"tt-201"}},
	}
	for _, tc := range cases {
		out, stderr, code := runCmd(t, "", tc.args...)
		if code != 0 {
			t.Fatalf("%v: exit %d: %s", tc.args, code, stderr)
		}
		rest := out
		for _, w := range tc.want {
			i := strings.Index(rest, w)
			if i < 0 {
				t.Errorf("%v: output lacks %q (in order):\n%s", tc.args, w, out)
				break
			}
			rest = rest[i+len(w):]
		}
		for _, n := range tc.not {
			if strings.Contains(out, n) {
				t.Errorf("%v: output has %q:\n%s", tc.args, n, out)
			}
		}
	}
}
