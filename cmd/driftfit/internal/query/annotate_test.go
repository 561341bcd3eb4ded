package query_test

import (
	"encoding/json"
	"math"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/query"
	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// reviewFile writes a state file holding the hourly records of qm.a
// (see hourlyFile) and, for sensor qm.a, the given events and tickets.
func reviewFile(t *testing.T, evs []alert.Event, tks []alert.Ticket) (query.Source, time.Time) {
	t.Helper()
	path, t0 := hourlyFile(t)
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	w := store.AlertWrite{Sensor: "qm.a", Tickets: map[string][]byte{}}
	for _, ev := range evs {
		data, err := json.Marshal(ev)
		if err != nil {
			t.Fatal(err)
		}
		w.Events = append(w.Events, store.TimedValue{At: ev.At, Data: data})
	}
	for _, tk := range tks {
		data, err := json.Marshal(tk)
		if err != nil {
			t.Fatal(err)
		}
		w.Tickets[tk.ID] = data
	}
	if err := db.WriteAlerts([]store.AlertWrite{w}); err != nil {
		t.Fatal(err)
	}
	if err := db.Check(); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	src, err := query.Open(path, ingest.BusOptions{Servers: []string{"nats://127.0.0.1:1"}}, "query test")
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { src.Close() })
	return src, t0
}

// TestStoredUnit_FallbackOrder checks where history takes the unit from
// when neither --unit nor --config gives it: the newest ticket, else the
// newest event whose unit names the sensor's (slope "kPa/d" → kPa), else
// nothing.
func TestStoredUnit_FallbackOrder(t *testing.T) {
	t0 := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	slope := alert.Event{Type: alert.Raised, Sensor: "qm.a", Window: "1d/1h", Kind: alert.Slope, Severity: alert.Warning, At: t0.Add(48 * time.Hour), Unit: "bar/d"}
	lead := alert.Event{Type: alert.Raised, Sensor: "qm.a", Window: "1d/1h", Kind: alert.LeadTime, Severity: alert.Warning, At: t0.Add(72 * time.Hour), Unit: "d"}
	other := alert.Event{Type: alert.Raised, Sensor: "qm.b", Kind: alert.Slope, At: t0.Add(96 * time.Hour), Unit: "degC/d"}
	older := alert.Ticket{ID: "qm.a@1", Sensor: "qm.a", Opened: t0.Add(24 * time.Hour), Unit: "psi"}
	newer := alert.Ticket{ID: "qm.a@2", Sensor: "qm.a", Opened: t0.Add(50 * time.Hour), Unit: "kPa"}
	for _, tc := range []struct {
		name string
		evs  []alert.Event
		tks  []alert.Ticket
		want string
	}{
		{"newest ticket first", []alert.Event{slope}, []alert.Ticket{newer, older}, "kPa"},
		// A lead-time event's unit is days, which says nothing of the
		// sensor's; another sensor's events do not count.
		{"event without ticket", []alert.Event{slope, lead, other}, nil, "bar"},
		{"nothing stored", []alert.Event{lead, other}, nil, ""},
	} {
		t.Run(tc.name, func(t *testing.T) {
			src, _ := reviewFile(t, tc.evs, tc.tks)
			got, err := query.StoredUnit(src, "qm.a")
			if err != nil || got != tc.want {
				t.Errorf("StoredUnit = %q, %v; want %q", got, err, tc.want)
			}
		})
	}
}

// TestEventUnit_InvertsReportUnit checks EventUnit against the alert
// package's own report units.
func TestEventUnit_InvertsReportUnit(t *testing.T) {
	for _, k := range []alert.Kind{alert.Slope, alert.Curvature, alert.Step, alert.OutOfSpan} {
		if got := query.EventUnit(k, alert.ReportUnit(k, "m3/h")); got != "m3/h" {
			t.Errorf("EventUnit(%v, %q) = %q, want m3/h", k, alert.ReportUnit(k, "m3/h"), got)
		}
	}
	for _, k := range []alert.Kind{alert.LeadTime, alert.Doubling, alert.Spike} {
		if got := query.EventUnit(k, alert.ReportUnit(k, "m3/h")); got != "" {
			t.Errorf("EventUnit(%v) = %q, want none", k, got)
		}
	}
	if got := query.EventUnit(alert.Slope, "kPa"); got != "" {
		t.Errorf("EventUnit(slope, kPa) = %q: a slope unit without /d names nothing", got)
	}
}

// TestAnnotate_AsLeftOrder checks the as-left values in force over the
// file's records: before the calibration the configured one, after it
// the calibration's; without configuration the ticket's before it; with
// neither the level of the first fit that passes the evidence gates.
func TestAnnotate_AsLeftOrder(t *testing.T) {
	t0 := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	cal := t0.Add(20 * 24 * time.Hour)
	tk := alert.Ticket{ID: "qm.a@1", Sensor: "qm.a", Class: "press", Opened: t0.Add(10 * 24 * time.Hour), Due: t0.Add(30 * 24 * time.Hour),
		Unit: "kPa", AsLeft: 2.5, Tolerance: 1.5, Evidence: alert.FitSummary{Model: "line"},
		Calibration: &alert.Calibration{Time: cal, AsFound: 3.1, AsLeft: 2}}
	raised := alert.Event{Type: alert.Raised, Sensor: "qm.a", Class: "press", Window: "1d/1h", Kind: alert.Slope, Severity: alert.Critical,
		At: t0.Add(10 * 24 * time.Hour), Value: 0.4, Limit: 0.3, Unit: "kPa/d"}
	doubling := alert.Event{Type: alert.Raised, Sensor: "qm.a", Window: "1d/1h", Kind: alert.Doubling, Severity: alert.Warning,
		At: t0.Add(11 * 24 * time.Hour), Value: 0.1, Limit: 0.01, Unit: "1/d"}
	src, _ := reviewFile(t, []alert.Event{raised, doubling}, []alert.Ticket{tk})
	from, to := t0, t0.Add(40*24*time.Hour)

	rule := alert.DefaultRule()
	rule.Class, rule.Tolerance, rule.AsLeft, rule.HasAsLeft = "press", 1, 3, true
	rule.Windows = []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}}
	rule.Limits.Slope = alert.RateLimit{Warning: 0.1, Critical: 0.2}
	an, err := query.Annotate(src, "qm.a", &rule, nil, from, to)
	if err != nil {
		t.Fatal(err)
	}
	if len(an.AsLeft) != 2 || an.AsLeft[0].Value != 3 || an.AsLeft[0].Source != "configuration" ||
		an.AsLeft[1].Value != 2 || !an.AsLeft[1].Since.Equal(cal) {
		t.Errorf("with rule: as-left %+v, want 3 (configuration) then 2 from %v", an.AsLeft, cal)
	}
	if an.Tolerance != 1 || an.Limits.SlopeCritical != 0.2 || len(an.Calibrations) != 1 || len(an.Events) != 2 || len(an.Tickets) != 1 {
		t.Errorf("with rule: tolerance %v, limits %+v, %d calibrations, %d events, %d tickets", an.Tolerance, an.Limits, len(an.Calibrations), len(an.Events), len(an.Tickets))
	}
	if len(an.Models) != 1 {
		t.Errorf("with rule: models %v, want the line only (no curvature or doubling limit)", an.Models)
	}

	an, err = query.Annotate(src, "qm.a", nil, nil, from, to)
	if err != nil {
		t.Fatal(err)
	}
	if len(an.AsLeft) != 2 || an.AsLeft[0].Value != 2.5 || an.AsLeft[1].Value != 2 {
		t.Errorf("without rule: as-left %+v, want 2.5 (the ticket's) then 2", an.AsLeft)
	}
	// Stored values: the ticket's tolerance and class, the critical
	// slope level the alert was raised at, and the doubling time
	// ln 2 / 0.01 per day = 69.3 d behind the doubling alert.
	wantDoubling := time.Duration(0.6931471805599453 / 0.01 * float64(24*time.Hour))
	if an.Tolerance != 1.5 || an.Class != "press" || an.Limits.SlopeCritical != 0.3 || an.Limits.SlopeWarning != 0 ||
		an.Limits.DoublingWarning != wantDoubling || len(an.Models) != 2 || an.Models[1] != rolling.Exp {
		t.Errorf("without rule: tolerance %v, class %q, limits %+v, models %v", an.Tolerance, an.Class, an.Limits, an.Models)
	}

	// No calibration, ticket or configured value, and the default gate
	// of 30 readings: a 1d/1h window of hourly readings holds at most
	// 24, so no fit passes and no as-left is known.
	bare, _ := reviewFile(t, nil, nil)
	an, err = query.Annotate(bare, "qm.a", nil, nil, from, to)
	if err != nil || len(an.AsLeft) != 0 {
		t.Errorf("bare file: as-left %+v, %v; want none (no fit passes 30 readings)", an.AsLeft, err)
	}
	// A gate of 20 readings passes from the record of readings 0..19 on,
	// but a day of hourly readings has at most 23 consecutive pairs, too
	// few to estimate their serial correlation (rolling.MinPairs), so
	// the service judges none of them, and no as-left is known either.
	rule = alert.DefaultRule()
	rule.MinReadings, rule.Windows, rule.Class, rule.Tolerance = 20, nil, "press", 1
	an, err = query.Annotate(bare, "qm.a", &rule, nil, from, to)
	if err != nil || len(an.AsLeft) != 0 {
		t.Errorf("gate of 20: as-left %+v, %v; want none (serial correlation not known)", an.AsLeft, err)
	}
	// Records that carry no serial information (Pairs 0, as written by
	// hand) are judged on their plain standard errors. The first that
	// passes holds readings 0..19 (t0 .. t0 + 19 h, value k mod 5).
	// Hours x: Σx = 190, Σy = 40, Σxy = 420, Σx² = 2470, n = 20, so
	// Sxy = 420 − 190·40/20 = 40, Sxx = 2470 − 190²/20 = 665, slope
	// 40/665 per hour, and the level at the newest reading
	// 2 + (40/665)(19 − 9.5) = 18/7.
	plainPath, _ := hourlyFileWith(t, func(sol *rolling.Solution) {
		for _, m := range rolling.Models {
			sol.Fit(m).SetSerial(0, 0)
		}
	})
	plain, err := query.Open(plainPath, ingest.BusOptions{Servers: []string{"nats://127.0.0.1:1"}}, "query test")
	if err != nil {
		t.Fatal(err)
	}
	defer plain.Close()
	an, err = query.Annotate(plain, "qm.a", &rule, nil, from, to)
	if err != nil || len(an.AsLeft) != 1 || an.AsLeft[0].Source != "first judged fit 2026-01-01 19:00" || math.Abs(an.AsLeft[0].Value-18.0/7) > 1e-12 {
		t.Errorf("gate of 20, no serial information: as-left %+v, %v; want 18/7 from the first judged fit at 2026-01-01 19:00", an.AsLeft, err)
	}
}
