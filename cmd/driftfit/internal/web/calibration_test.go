package web_test

import (
	"encoding/csv"
	"fmt"
	"math"
	"math/rand/v2"
	"strconv"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/query"
	"driftfit/cmd/driftfit/internal/web"
	"driftfit/rolling"
)

// idCal drifts 0.8 kPa a day for six days, over the warning slope of
// serviceRule, then holds.
const idCal = "qm.u7.press.pt-5"

// calPlant returns idCal's readings from from (inclusive) to to
// (exclusive), every 10 minutes, on 500 kPa + 0.8 kPa/day from start
// for six days, then flat, with white noise of SD 0.2 kPa; the seed
// (11) is fixed.
func calPlant(start, from, to time.Time) map[string][]rolling.Reading {
	rng := rand.New(rand.NewPCG(11, uint64(from.Unix())))
	var rs []rolling.Reading
	for at := from; at.Before(to); at = at.Add(10 * time.Minute) {
		d := min(at.Sub(start).Hours()/24, 6)
		rs = append(rs, rolling.Reading{UnixNano: at.UnixNano(), Value: 500 + 0.8*d + 0.2*rng.NormFloat64()})
	}
	return map[string][]rolling.Reading{idCal: rs}
}

// TestSensor_CalibrationRecordsAsOf runs a real service over a drifting
// sensor and, with the service's clock set by the test, records a
// calibration, voids it, records another (entered three hours after the
// work) and corrects it. The sensor page, its CSV, the fleet and the
// plot annotations must draw and centre on the calibrations as the
// records say they stood at each time: a voided one struck and never
// as a calibration, a corrected one replaced by its correction, one not
// yet recorded not at all.
func TestSensor_CalibrationRecordsAsOf(t *testing.T) {
	start := time.Date(2026, 10, 1, 0, 0, 0, 0, time.UTC)
	at := func(days float64) time.Time { return start.Add(time.Duration(days * 24 * float64(time.Hour))) }
	var clock atomic.Int64
	clock.Store(at(6).UnixNano())
	ls := startService(t, func() time.Time { return time.Unix(0, clock.Load()).UTC() })
	ctx := t.Context()

	ls.feed(calPlant(start, at(0), at(6)))
	cal1 := alert.Calibration{Time: at(6), AsFound: 504.8, AsLeft: 504}
	if err := ls.svc.Calibrate(ctx, idCal, cal1, false); err != nil {
		t.Fatal(err)
	}
	// The clock stands at the end of the readings fed, none of which is
	// then ahead of it.
	clock.Store(at(9).UnixNano())
	ls.feed(calPlant(start, at(6), at(9)))
	const voidReason = "entered for the wrong tag"
	if _, err := ls.svc.VoidCalibration(ctx, idCal, 1, voidReason); err != nil {
		t.Fatal(err)
	}
	clock.Store(at(10).UnixNano())
	ls.feed(calPlant(start, at(9), at(10)))
	cal2 := alert.Calibration{Time: at(10).Add(-3 * time.Hour), AsFound: 508, AsLeft: 507}
	if err := ls.svc.Calibrate(ctx, idCal, cal2, false); err != nil {
		t.Fatal(err)
	}
	clock.Store(at(11).UnixNano())
	ls.feed(calPlant(start, at(10), at(11)))
	rec3, err := ls.svc.CorrectCalibration(ctx, idCal, 2, alert.Calibration{AsFound: 508, AsLeft: 507.5}, "as-left misread")
	if err != nil {
		t.Fatal(err)
	}
	if rec3.Seq != 3 || !rec3.Time.Equal(cal2.Time) {
		t.Fatalf("correction recorded as %+v, want no. 3 at %v", rec3, cal2.Time)
	}
	clock.Store(at(12).UnixNano())
	ls.feed(calPlant(start, at(11), at(12)))
	ls.stop()
	db := ls.db

	srv := newServer(t, web.Options{DB: db, Rule: serviceRule, Now: func() time.Time { return at(12) }})
	page := func(asof time.Time) (sensorJSON, string, [][]string) {
		t.Helper()
		q := "?asof=" + asof.Format(time.RFC3339Nano)
		v := getJSON[sensorJSON](t, srv, "/api/sensors/"+idCal+q)
		_, html := get(t, srv, "/sensors/"+idCal+q)
		_, body := get(t, srv, "/sensors/"+idCal+".csv"+q)
		rows, err := csv.NewReader(strings.NewReader(body)).ReadAll()
		if err != nil {
			t.Fatal(err)
		}
		return v, html, rows
	}

	// Before any calibration the centre is the first judged fit's level,
	// as the service takes it; the void must bring back that value.
	before, _, _ := page(at(5))
	if before.AsLeft == nil || before.AsLeft.Source != "first judged fit" || len(before.Calibrations) != 0 {
		t.Fatalf("as of day 5: as-left %+v, calibrations %+v; want the first judged fit's level and none", before.AsLeft, before.Calibrations)
	}
	firstLevel := before.AsLeft.Value
	// The drift opens a ticket early on, against the service's own
	// centre: the page's value. The first calibration closes it, the void
	// reopens it (no other ticket opened in between: the sensor held
	// still), the second closes it again and the correction amends it.
	if len(before.Tickets) != 1 {
		t.Fatalf("as of day 5: tickets %+v, want the one the drift opened", before.Tickets)
	}
	ticketID := before.Tickets[0].ID
	if al := before.Tickets[0].AsLeft; al != firstLevel {
		t.Errorf("ticket %s opened against as-left %v; the page takes %v", ticketID, al, firstLevel)
	}

	// The first calibration reset the firing alert; the reset event
	// stays after the void, and must not be read as a calibration.
	resets := 0
	for _, ev := range getJSON[sensorJSON](t, srv, "/api/sensors/"+idCal).Events {
		if ev.Type == alert.Reset && ev.At.Equal(cal1.Time) {
			resets++
		}
	}
	if resets == 0 {
		t.Fatalf("no reset event at the voided calibration's time %v: the case this test is for is not made", cal1.Time)
	}

	type want struct {
		name           string
		asof           time.Time
		marks          map[uint64]string // record no. → in_force, voided or corrected
		asLeft         float64
		asLeftSource   string
		solid, struck  int       // markers on the page
		ticketClosedBy *float64  // the as-left of the calibration closing the ticket; nil: open
		lastCal        time.Time // the newest calibration that stands
	}
	f := func(v float64) *float64 { return &v }
	cases := []want{
		{name: "after the first calibration", asof: at(7), marks: map[uint64]string{1: "in_force"},
			asLeft: 504, asLeftSource: "calibration", solid: 1, ticketClosedBy: f(504), lastCal: cal1.Time},
		{name: "an hour before the void", asof: at(9).Add(-time.Hour), marks: map[uint64]string{1: "in_force"},
			asLeft: 504, asLeftSource: "calibration", solid: 1, ticketClosedBy: f(504), lastCal: cal1.Time},
		{name: "after the void", asof: at(9).Add(time.Hour), marks: map[uint64]string{1: "voided"},
			asLeft: firstLevel, asLeftSource: "first judged fit", struck: 1},
		{name: "after the second calibration's time, before it was recorded", asof: at(10).Add(-time.Hour), marks: map[uint64]string{1: "voided"},
			asLeft: firstLevel, asLeftSource: "first judged fit", struck: 1},
		{name: "after the second calibration", asof: at(10).Add(time.Hour), marks: map[uint64]string{1: "voided", 2: "in_force"},
			asLeft: 507, asLeftSource: "calibration", solid: 1, struck: 1, ticketClosedBy: f(507), lastCal: cal2.Time},
		{name: "after the correction", asof: at(11).Add(time.Hour), marks: map[uint64]string{1: "voided", 2: "corrected", 3: "in_force"},
			asLeft: 507.5, asLeftSource: "calibration", solid: 1, struck: 1, ticketClosedBy: f(507.5), lastCal: cal2.Time},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			v, html, rows := page(tc.asof)
			got := map[uint64]string{}
			for _, c := range v.Calibrations {
				st := "in_force"
				switch {
				case !c.Voided.IsZero():
					st = "voided"
					if c.Reason != voidReason || !c.Voided.Equal(at(9)) {
						t.Errorf("voided calibration %+v, want voided at %v for %q", c, at(9), voidReason)
					}
				case !c.Corrected.IsZero():
					st = "corrected"
					if c.CorrectedBy != 3 || *c.AsLeft != 507 {
						t.Errorf("corrected calibration %+v, want as-left 507 corrected by no. 3", c)
					}
				}
				if c.Seq == 0 {
					t.Errorf("calibration %+v without a record number: read back from tickets or events", c)
				}
				got[c.Seq] = st
			}
			if len(got) != len(tc.marks) || len(v.Calibrations) != len(tc.marks) {
				t.Errorf("calibrations %+v, want %v", v.Calibrations, tc.marks)
			}
			for n, st := range tc.marks {
				if got[n] != st {
					t.Errorf("calibration no. %d: %q, want %q", n, got[n], st)
				}
			}
			if v.AsLeft == nil || v.AsLeft.Value != tc.asLeft || v.AsLeft.Source != tc.asLeftSource {
				t.Errorf("as-left %+v, want %v from %s", v.AsLeft, tc.asLeft, tc.asLeftSource)
			} else if tc.asLeftSource == "calibration" && !v.AsLeft.Since.Equal(tc.lastCal) {
				t.Errorf("as-left since %v, want the calibration at %v", v.AsLeft.Since, tc.lastCal)
			}
			if v.AsLeft != nil && (v.Band == nil || v.Band[0] != v.AsLeft.Value-3 || v.Band[1] != v.AsLeft.Value+3) {
				t.Errorf("tolerance band %v around as-left %v, want ± 3", v.Band, v.AsLeft.Value)
			}
			if n := strings.Count(html, `class="marker-cal"`); n != tc.solid {
				t.Errorf("%d calibration markers on the page, want %d", n, tc.solid)
			}
			if n := strings.Count(html, `class="marker-cal-voided"`); n != tc.struck {
				t.Errorf("%d voided markers on the page, want %d", n, tc.struck)
			}
			if tc.struck > 0 && !strings.Contains(html, voidReason) {
				t.Errorf("the page does not say why the calibration was voided")
			}
			// The CSV holds the calibrations the JSON does, with their
			// status and values.
			col := map[string]int{}
			for i, h := range rows[0] {
				col[h] = i
			}
			csvMarks := map[string]string{}
			for _, r := range rows[1:] {
				if r[0] == "calibration" {
					csvMarks[r[col["detail"]][:strings.Index(r[col["detail"]], " recorded")]] = r[col["status"]] + " " + r[col["as_left"]]
				}
			}
			if len(csvMarks) != len(tc.marks) {
				t.Errorf("CSV calibrations %v, want %v", csvMarks, tc.marks)
			}
			for _, c := range v.Calibrations {
				key := fmt.Sprintf("no. %d", c.Seq)
				if want := got[c.Seq] + " " + strconv.FormatFloat(*c.AsLeft, 'g', -1, 64); csvMarks[key] != want {
					t.Errorf("CSV %s: %q, want %q", key, csvMarks[key], want)
				}
			}
			if len(v.Tickets) != 1 || v.Tickets[0].ID != ticketID {
				t.Fatalf("tickets %+v, want %s alone", v.Tickets, ticketID)
			}
			switch tk := v.Tickets[0]; {
			case tc.ticketClosedBy == nil && (!tk.Open || tk.Calibration != nil):
				t.Errorf("ticket %s: open %v, calibration %+v; want it open", ticketID, tk.Open, tk.Calibration)
			case tc.ticketClosedBy != nil && (tk.Open || tk.Calibration == nil || tk.Calibration.AsLeft != *tc.ticketClosedBy):
				t.Errorf("ticket %s: open %v, calibration %+v; want it closed by as-left %v", ticketID, tk.Open, tk.Calibration, *tc.ticketClosedBy)
			}
		})
	}

	// The plot draws the records as they stand now: no. 1 struck, no. 2
	// not at all, no. 3 with its rule; the as-left bands are the first
	// judged level (or the ticket's, the same value) until no. 3's time,
	// then 507.5. The voided calibration bounds no band.
	rule, _ := serviceRule(idCal)
	an, err := query.Annotate(db, idCal, &rule, nil, at(0), at(12))
	if err != nil {
		t.Fatal(err)
	}
	var stands, voided, corrected int
	for _, c := range an.Calibrations {
		switch {
		case c.Stands():
			stands++
			if c.Seq != 3 || *c.AsLeft != 507.5 || !c.Time.Equal(cal2.Time) {
				t.Errorf("plot: standing calibration %+v, want no. 3, 507.5 at %v", c, cal2.Time)
			}
		case !c.Voided.IsZero():
			voided++
		default:
			corrected++
		}
	}
	if stands != 1 || voided != 1 || corrected != 1 || len(an.Calibrations) != 3 {
		t.Errorf("plot: calibrations %+v; want one standing, one voided, one corrected", an.Calibrations)
	}
	if len(an.AsLeft) != 2 || math.Abs(an.AsLeft[0].Value-firstLevel) > 1e-9 || !an.AsLeft[0].Since.IsZero() ||
		an.AsLeft[1].Value != 507.5 || !an.AsLeft[1].Since.Equal(cal2.Time) {
		t.Errorf("plot: as-left %+v; want %v, then 507.5 from %v", an.AsLeft, firstLevel, cal2.Time)
	}

	// The fleet centres on the same as-left: the share of tolerance used
	// is |level − 507.5| / 3, the level of the longest judged window.
	now, _, _ := page(at(12))
	level, longest := math.NaN(), time.Duration(0)
	for _, w := range now.Windows {
		for _, spec := range serviceWindows {
			if w.Judged && w.Window == alert.WindowName(spec) && spec.Span > longest {
				level, longest = w.Fit.Coef[0], spec.Span
			}
		}
	}
	var used *float64
	for _, row := range rows(t, getJSON[fleetJSON](t, srv, "/api/fleet")) {
		if row.ID == idCal {
			used = row.ToleranceUsed
		}
	}
	if want := math.Abs(level-507.5) / 3; used == nil || math.Abs(*used-want) > 1e-9 {
		t.Errorf("fleet: tolerance used %v, want |%v − 507.5| / 3 = %v (window of %v)", used, level, want, longest)
	}
}
