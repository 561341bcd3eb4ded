package query_test

import (
	"encoding/json"
	"fmt"
	"math"
	"slices"
	"strings"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/query"
	"driftfit/ingest"
	"driftfit/ingest/readapi"
	"driftfit/rolling"
	"driftfit/store"
)

// reviewFile writes a state file holding the hourly records of qm.a
// (see hourlyFile) and, for sensor qm.a, the given events and tickets.
func reviewFile(t *testing.T, evs []alert.Event, tks []alert.Ticket) (query.Source, time.Time) {
	t.Helper()
	return reviewFileWith(t, evs, tks, nil)
}

// reviewFileWith is reviewFile with calibration records of qm.a, by
// number, stored as given.
func reviewFileWith(t *testing.T, evs []alert.Event, tks []alert.Ticket, cals map[uint64][]byte) (query.Source, time.Time) {
	t.Helper()
	path, t0 := hourlyFile(t)
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	w := store.AlertWrite{Sensor: "qm.a", Tickets: map[string][]byte{}, Calibrations: cals}
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

// TestAnnotate_CalibrationRecords checks where a plot's calibrations
// come from in a file holding both eras: a ticket closed by a
// calibration from before records were kept (read back from the
// ticket), then records: no. 1 voided (its reset event stays in the
// file), no. 2 corrected by no. 3. The voided one is marked, bounds no
// as-left and is not read back from its reset event; the correction
// carries the corrected value. With every record damaged, nothing is
// read back from tickets or events after all, and the legend says why.
func TestAnnotate_CalibrationRecords(t *testing.T) {
	t0 := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	day := func(d int) time.Time { return t0.Add(time.Duration(d) * 24 * time.Hour) }
	old := alert.Ticket{ID: "qm.a@1", Sensor: "qm.a", Class: "press", Opened: day(2), Due: day(9), Unit: "kPa", AsLeft: 2.5, Tolerance: 1.5,
		Evidence: alert.FitSummary{Model: "line"}, Calibration: &alert.Calibration{Time: day(5), AsFound: 3.1, AsLeft: 2}}
	reset := func(at time.Time) alert.Event {
		return alert.Event{Type: alert.Reset, Sensor: "qm.a", Class: "press", Window: "1d/1h", Kind: alert.Slope, Severity: alert.Warning, At: at, Unit: "kPa/d"}
	}
	evs := []alert.Event{reset(day(5)), reset(day(20)), reset(day(25))}
	rec := func(r ingest.CalibrationRecord) []byte {
		r.Sensor = "qm.a"
		data, err := json.Marshal(r)
		if err != nil {
			t.Fatal(err)
		}
		return data
	}
	recs := map[uint64][]byte{
		1: rec(ingest.CalibrationRecord{Seq: 1, Time: day(20), AsFound: 2.9, AsLeft: 2.2, Recorded: day(20), Status: ingest.CalibrationVoided,
			Changed: day(22), Reason: "wrong tag"}),
		2: rec(ingest.CalibrationRecord{Seq: 2, Time: day(25), AsFound: 3, AsLeft: 1.9, Recorded: day(25), Status: ingest.CalibrationCorrected,
			Changed: day(26), Reason: "misread", CorrectedBy: 3}),
		3: rec(ingest.CalibrationRecord{Seq: 3, Time: day(25), AsFound: 3, AsLeft: 1.8, Recorded: day(26), Status: ingest.CalibrationRecorded, Corrects: 2}),
	}
	src, _ := reviewFileWith(t, evs, []alert.Ticket{old}, recs)
	rule := alert.DefaultRule()
	rule.Class, rule.Tolerance, rule.AsLeft, rule.HasAsLeft = "press", 1, 3, true
	rule.Windows = []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}}
	an, err := query.Annotate(src, "qm.a", &rule, nil, day(0), day(40))
	if err != nil {
		t.Fatal(err)
	}
	type cal struct {
		day    int
		seq    uint64
		asLeft float64
		state  string
	}
	var got []cal
	for _, c := range an.Calibrations {
		st := "stands"
		switch {
		case !c.Voided.IsZero():
			st = "voided " + c.Reason
		case !c.Corrected.IsZero():
			st = "corrected " + c.Reason
		}
		got = append(got, cal{int(c.Time.Sub(t0) / (24 * time.Hour)), c.Seq, *c.AsLeft, st})
	}
	want := []cal{{5, 0, 2, "stands"}, {20, 1, 2.2, "voided wrong tag"}, {25, 2, 1.9, "corrected misread"}, {25, 3, 1.8, "stands"}}
	if !slices.Equal(got, want) {
		t.Errorf("calibrations %+v, want %+v", got, want)
	}
	// Configured until the old calibration, its as-left until the
	// correction's time, then the correction's: the voided no. 1 at day
	// 20 bounds nothing.
	if len(an.AsLeft) != 3 || an.AsLeft[0].Value != 3 || an.AsLeft[1].Value != 2 || !an.AsLeft[1].Since.Equal(day(5)) ||
		an.AsLeft[2].Value != 1.8 || !an.AsLeft[2].Since.Equal(day(25)) {
		t.Errorf("as-left %+v, want 3, then 2 from day 5, then 1.8 from day 25", an.AsLeft)
	}
	if len(an.Notes) != 0 {
		t.Errorf("notes %q, want none", an.Notes)
	}

	// A service of a build that keeps no records does not answer for
	// them: the tickets and events are read instead, and the legend says
	// so. The voided calibration's reset event then reads as one.
	an, err = query.Annotate(noRecords{src}, "qm.a", &rule, nil, day(0), day(40))
	if err != nil {
		t.Fatal(err)
	}
	got = got[:0]
	for _, c := range an.Calibrations {
		got = append(got, cal{day: int(c.Time.Sub(t0) / (24 * time.Hour)), seq: c.Seq})
	}
	if want := []cal{{day: 5}, {day: 20}, {day: 25}}; !slices.Equal(got, want) || len(an.Notes) != 1 || !strings.Contains(an.Notes[0], "tickets and alert events") {
		t.Errorf("without records from the service: calibrations %+v, notes %q; want days 5, 20, 25 from tickets and events, and a note", got, an.Notes)
	}

	damaged, _ := reviewFileWith(t, evs, []alert.Ticket{old}, map[uint64][]byte{1: []byte("not a record")})
	an, err = query.Annotate(damaged, "qm.a", &rule, nil, day(0), day(40))
	if err != nil {
		t.Fatal(err)
	}
	if len(an.Calibrations) != 0 || len(an.Notes) != 1 || !strings.Contains(an.Notes[0], "1 calibration records") {
		t.Errorf("every record damaged: calibrations %+v, notes %q; want none and a note of the damaged one", an.Calibrations, an.Notes)
	}
}

// noRecords is a source that answers as a service of a build without
// calibration records does: not at all.
type noRecords struct{ query.Source }

func (noRecords) Calibrations(string, func(string, uint64, []byte) error) error {
	return fmt.Errorf("%w at nats://127.0.0.1:4222 on %s within 10s", readapi.ErrNoAnswer, readapi.CalibrationsSubject)
}
