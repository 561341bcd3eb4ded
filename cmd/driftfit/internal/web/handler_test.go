package web_test

import (
	"encoding/csv"
	"encoding/json"
	"io"
	"math"
	"net/http"
	"net/http/httptest"
	"net/url"
	"slices"
	"sort"
	"strings"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/web"
	"driftfit/rolling"
	"driftfit/store"
)

func newServer(t *testing.T, o web.Options) *httptest.Server {
	t.Helper()
	srv := httptest.NewServer(web.Handler(o))
	t.Cleanup(srv.Close)
	return srv
}

// get fetches path and returns the status and body.
func get(t *testing.T, srv *httptest.Server, path string, hdr ...string) (int, string) {
	t.Helper()
	req, err := http.NewRequestWithContext(t.Context(), http.MethodGet, srv.URL+path, nil)
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i+1 < len(hdr); i += 2 {
		req.Header.Set(hdr[i], hdr[i+1])
	}
	res, err := srv.Client().Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer res.Body.Close()
	b, err := io.ReadAll(res.Body)
	if err != nil {
		t.Fatal(err)
	}
	return res.StatusCode, string(b)
}

func getJSON[T any](t *testing.T, srv *httptest.Server, path string) T {
	t.Helper()
	st, body := get(t, srv, path)
	if st != http.StatusOK {
		t.Fatalf("GET %s = %d %s", path, st, body)
	}
	var v T
	if err := json.Unmarshal([]byte(body), &v); err != nil {
		t.Fatalf("GET %s: %v", path, err)
	}
	return v
}

func demoServer(t *testing.T) (*store.DB, *httptest.Server) {
	t.Helper()
	db := openDB(t)
	fillDemo(t, db)
	return db, newServer(t, web.Options{DB: db, Rule: ruleFunc(demoRules()), Now: func() time.Time { return demoEnd }})
}

// lineSolution makes a stored solution by hand: a line fit on a 14-day
// window of daily panes with the given level, slope and slope SE, every
// pane filled; the parabola and exp fits report too little data.
func lineSolution(last time.Time, n int, c0, c1, se1 float64) *rolling.Solution {
	w := rolling.WindowSpec{Span: 14 * 24 * time.Hour, Pane: 24 * time.Hour}
	first := last.Add(-13 * 24 * time.Hour)
	// t(0.975, 98) = 1.9845 (any Student t table, e.g. NIST/SEMATECH
	// e-Handbook of Statistical Methods, section 1.3.6.7.2).
	const tc = 1.9845
	se0 := 0.1
	line := rolling.Fit{Model: rolling.Line, N: n, First: first, Last: last,
		Coef: [3]float64{c0, c1}, SE: [3]float64{se0, se1},
		CI:      [3][2]float64{{c0 - tc*se0, c0 + tc*se0}, {c1 - tc*se1, c1 + tc*se1}},
		Cov:     [3][3]float64{{se0 * se0, 0}, {0, se1 * se1}},
		ResidSD: 0.5, R2: 0.5, DF: n - 2, TCrit: tc, Cond: 3, PosDef: true}
	none := func(m rolling.Model) rolling.Fit {
		return rolling.Fit{Model: m, Err: rolling.ErrNotEnoughData, N: n, First: first, Last: last}
	}
	return &rolling.Solution{Window: w, Panes: 14, Filled: 14, N: n, First: first, Last: last,
		Line: line, Parabola: none(rolling.Parabola), Exp: none(rolling.Exp)}
}

type fleetJSON struct {
	AsOf    time.Time         `json:"as_of"`
	Counts  web.FleetCounts   `json:"counts"`
	Sensors []json.RawMessage `json:"sensors"`
}

type rowJSON struct {
	Rank          int    `json:"rank"`
	ID            string `json:"id"`
	Href          string `json:"href"`
	State         string `json:"state"`
	Reason        string `json:"reason"`
	Ticket        *struct{ Due time.Time }
	Exit          *web.Exit  `json:"exit"`
	ToleranceUsed *float64   `json:"tolerance_used"`
	Significance  *float64   `json:"significance"`
	Alerts        []struct{} `json:"alerts"`
}

func rows(t *testing.T, f fleetJSON) []rowJSON {
	t.Helper()
	out := make([]rowJSON, len(f.Sensors))
	for i, raw := range f.Sensors {
		if err := json.Unmarshal(raw, &out[i]); err != nil {
			t.Fatal(err)
		}
	}
	return out
}

// TestFleet_RanksByUrgency checks the order on sensors whose fits are
// written by hand, so that each key of the ranking decides one pair.
func TestFleet_RanksByUrgency(t *testing.T) {
	db := openDB(t)
	now := time.Date(2026, 12, 1, 12, 0, 0, 0, time.UTC)
	last := now.Add(-time.Hour)
	rule := alert.DefaultRule()
	rule.Class, rule.Unit, rule.Tolerance = "pressure", "kPa", 2
	rule.AsLeft, rule.HasAsLeft = 100, true
	rule.Windows = []rolling.WindowSpec{{Span: 14 * 24 * time.Hour, Pane: 24 * time.Hour}}
	rule.MinReadings, rule.MinCoverage = 20, 0.5
	rule.Limits.Slope = alert.RateLimit{Warning: 0.1}
	sensors := []struct {
		id           string
		n            int
		c0, c1, se1  float64
		dueInDays    float64 // > 0: an open ticket due then
		r1           float64 // ≠ 0: the line carries this lag-1 correlation over n − 1 pairs
		rule         bool
		wantExitDays float64 // 0: no exit expected
		wantShare    float64
	}{
		// Tickets first, by due date: b (3 d) before a (5 d).
		{id: "qm.r.a", n: 100, c0: 100, c1: 0, se1: 0.01, dueInDays: 5, rule: true, wantShare: 0},
		{id: "qm.r.b", n: 100, c0: 100, c1: 0, se1: 0.01, dueInDays: 3, rule: true, wantShare: 0},
		// Then predicted exits: the upper edge is 100 + 2 = 102, reached
		// after (102 − 100.5)/0.5 = 3 days by c, (102 − 100)/0.1 = 20 days
		// by d.
		{id: "qm.r.c", n: 100, c0: 100.5, c1: 0.5, se1: 0.05, rule: true, wantExitDays: 3, wantShare: 0.25},
		{id: "qm.r.d", n: 100, c0: 100, c1: 0.1, se1: 0.01, rule: true, wantExitDays: 20, wantShare: 0},
		// Then the share of tolerance used: |101.2 − 100|/2 = 0.6 for e;
		// its slope 0.001 ± 1.98·0.01 includes zero, so no exit counts.
		{id: "qm.r.e", n: 100, c0: 101.2, c1: 0.001, se1: 0.01, rule: true, wantShare: 0.6},
		// f and g both use 0.3; g's |slope|/SE 0.4 beats f's 0.
		{id: "qm.r.f", n: 100, c0: 100.6, c1: 0, se1: 0.01, rule: true, wantShare: 0.3},
		{id: "qm.r.g", n: 100, c0: 100.6, c1: 0.004, se1: 0.01, rule: true, wantShare: 0.3},
		// j is g with serially correlated residuals, r1 = 0.5: n_eff =
		// 100·(1 − 0.5)/(1 + 0.5) = 33.33 (Santer et al. 2000), SE × √(98/31.33)
		// = 1.7685, so |slope|/SE = 0.4/1.7685 = 0.2262: between g and f.
		{id: "qm.r.j", n: 100, c0: 100.6, c1: 0.004, se1: 0.01, r1: 0.5, rule: true, wantShare: 0.3},
		// Not judged, then no rule: nothing to rank them by but the id.
		{id: "qm.r.h", n: 5, c0: 100, c1: 0, se1: 0.01, rule: true},
		{id: "qm.r.i", n: 100, c0: 100, c1: 0, se1: 0.01},
	}
	want := []string{"qm.r.b", "qm.r.a", "qm.r.c", "qm.r.d", "qm.r.e", "qm.r.g", "qm.r.j", "qm.r.f", "qm.r.h", "qm.r.i"}
	rules := map[string]alert.Rule{}
	var b store.Batch
	var writes []store.AlertWrite
	for _, s := range sensors {
		sol := lineSolution(last, s.n, s.c0, s.c1, s.se1)
		if s.r1 != 0 {
			sol.Line.SetSerial(s.r1, s.n-1)
		}
		if err := b.Record(s.id, sol); err != nil {
			t.Fatal(err)
		}
		if s.rule {
			rules[s.id] = rule
		}
		if s.dueInDays > 0 {
			tk := alert.Ticket{ID: s.id + "@x", Sensor: s.id, Opened: now.Add(-24 * time.Hour), Reason: alert.Slope,
				Severity: alert.Warning, Window: "14d/1d", Unit: "kPa", Due: now.Add(time.Duration(s.dueInDays * 24 * float64(time.Hour)))}
			data, err := json.Marshal(tk)
			if err != nil {
				t.Fatal(err)
			}
			writes = append(writes, store.AlertWrite{Sensor: s.id, Tickets: map[string][]byte{tk.ID: data}})
		}
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	if err := db.WriteAlerts(writes); err != nil {
		t.Fatal(err)
	}
	srv := newServer(t, web.Options{DB: db, Rule: ruleFunc(rules), Now: func() time.Time { return now }})
	got := rows(t, getJSON[fleetJSON](t, srv, "/api/fleet"))
	var ids []string
	for _, r := range got {
		ids = append(ids, r.ID)
	}
	if !slices.Equal(ids, want) {
		t.Fatalf("fleet order = %v, want %v", ids, want)
	}
	byID := map[string]rowJSON{}
	for _, r := range got {
		byID[r.ID] = r
	}
	for _, s := range sensors {
		r := byID[s.id]
		if s.wantExitDays > 0 {
			wantAt := last.Add(time.Duration(s.wantExitDays * 24 * float64(time.Hour)))
			if r.Exit == nil || r.Exit.Kind != "ahead" || r.Exit.Edge != "upper" || absDur(r.Exit.At.Sub(wantAt)) > time.Second {
				t.Errorf("%s exit = %+v, want ahead at the upper edge at %v", s.id, r.Exit, wantAt)
			}
		} else if r.Exit != nil {
			t.Errorf("%s exit = %+v, want none", s.id, r.Exit)
		}
		if s.rule && s.n >= 20 && (r.ToleranceUsed == nil || math.Abs(*r.ToleranceUsed-s.wantShare) > 1e-12) {
			t.Errorf("%s tolerance used = %v, want %v", s.id, r.ToleranceUsed, s.wantShare)
		}
	}
	if r := byID["qm.r.h"]; r.State != web.StateNotJudged || r.Reason != "14d/1d: too few readings 5 < 20" {
		t.Errorf("qm.r.h state %q reason %q, want not judged: too few readings 5 < 20", r.State, r.Reason)
	}
	if r := byID["qm.r.i"]; r.State != web.StateNoRule {
		t.Errorf("qm.r.i state %q, want no_rule", r.State)
	}
	if j := byID["qm.r.j"]; j.Significance == nil || math.Abs(*j.Significance-0.4/math.Sqrt(98/(100.0/3-2))) > 1e-9 {
		t.Errorf("qm.r.j significance = %v, want 0.4/√(98/31.33) = 0.2262 (serially corrected)", j.Significance)
	}
	if g := byID["qm.r.g"]; g.Significance == nil || math.Abs(*g.Significance-0.4) > 1e-12 {
		t.Errorf("qm.r.g significance = %v, want 0.004/0.01 = 0.4", g.Significance)
	}
}

func absDur(d time.Duration) time.Duration {
	if d < 0 {
		return -d
	}
	return d
}

// TestFleet_DemoRanking checks the demo fleet's order against the stored
// tickets: the sensors with an open ticket come first, by due date.
func TestFleet_DemoRanking(t *testing.T) {
	db, srv := demoServer(t)
	type due struct {
		id  string
		due time.Time
	}
	var open []due
	err := db.Tickets(func(_ string, data []byte) error {
		var tk alert.Ticket
		if err := json.Unmarshal(data, &tk); err != nil {
			return err
		}
		if tk.Calibration == nil {
			open = append(open, due{tk.Sensor, tk.Due})
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	sort.Slice(open, func(i, j int) bool { return open[i].due.Before(open[j].due) })
	if len(open) < 2 {
		t.Fatalf("demo has %d open tickets, want at least 2 for a ranking", len(open))
	}
	got := rows(t, getJSON[fleetJSON](t, srv, "/api/fleet"))
	for i, d := range open {
		if got[i].ID != d.id {
			t.Errorf("fleet row %d = %s, want %s (ticket due %v)", i+1, got[i].ID, d.id, d.due)
		}
	}
	f := getJSON[fleetJSON](t, srv, "/api/fleet")
	if f.Counts.OpenTickets != len(open) || f.Counts.Sensors != len(demoSensors()) {
		t.Errorf("counts = %+v, want %d open tickets and %d sensors", f.Counts, len(open), len(demoSensors()))
	}
}

func TestFleet_Filters(t *testing.T) {
	_, srv := demoServer(t)
	tests := []struct {
		name, query string
		want        []string // ids, sorted
	}{
		{"pattern", "q=" + url.QueryEscape("qm.u1.*"), []string{idTT, idPT}},
		{"substring", "q=lab", []string{idRef, idFM}},
		{"class", "class=gas-detector", []string{idGD}},
		{"no rule", "state=no_rule", []string{idFM}},
		{"not judged", "state=not_judged", []string{idRef}},
		{"nothing", "q=nowhere", nil},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var ids []string
			for _, r := range rows(t, getJSON[fleetJSON](t, srv, "/api/fleet?"+tc.query)) {
				ids = append(ids, r.ID)
			}
			slices.Sort(ids)
			want := slices.Clone(tc.want)
			slices.Sort(want)
			if !slices.Equal(ids, want) {
				t.Errorf("/api/fleet?%s = %v, want %v", tc.query, ids, want)
			}
		})
	}
	// Rank is the place in the whole fleet, also when filtered.
	rank := map[string]int{}
	for _, r := range rows(t, getJSON[fleetJSON](t, srv, "/api/fleet")) {
		rank[r.ID] = r.Rank
	}
	for _, r := range rows(t, getJSON[fleetJSON](t, srv, "/api/fleet?state=not_judged")) {
		if r.Rank != rank[r.ID] {
			t.Errorf("%s filtered rank %d, whole-fleet rank %d", r.ID, r.Rank, rank[r.ID])
		}
	}
	st, body := get(t, srv, "/api/fleet?state=maybe")
	if st != http.StatusBadRequest || !strings.Contains(body, `state=\"maybe\"`) {
		t.Errorf("state=maybe: %d %s, want 400 naming the parameter", st, body)
	}
	// The page itself: rows rendered by the server, filtered alike.
	st, body = get(t, srv, "/?class=gas-detector")
	if st != http.StatusOK || !strings.Contains(body, idGD) || strings.Contains(body, idPT) {
		t.Errorf("fleet page filtered on class: status %d, holds %s: %v, holds %s: %v", st, idGD, strings.Contains(body, idGD), idPT, strings.Contains(body, idPT))
	}
}

type sensorJSON struct {
	ID      string    `json:"id"`
	AsOf    time.Time `json:"as_of"`
	Model   string    `json:"model"`
	State   string    `json:"state"`
	Windows []struct {
		Window string    `json:"window"`
		Record time.Time `json:"record_time"`
		Judged bool      `json:"judged"`
		Fit    struct {
			Model string      `json:"model"`
			Coef  []float64   `json:"coef"`
			Cov   [][]float64 `json:"cov"`
			T     float64     `json:"t"`
		} `json:"fit"`
		Curve []web.CurvePoint `json:"curve"`
	} `json:"windows"`
	Alerts       []web.OpenAlert       `json:"alerts"`
	Events       []alert.Event         `json:"events"`
	Tickets      []web.TicketView      `json:"tickets"`
	Calibrations []web.CalibrationView `json:"calibrations"`
	History      []web.HistoryRow      `json:"history"`
	From         time.Time             `json:"from"`
	AsLeft       *web.AsLeft           `json:"as_left"`
	Band         *[2]float64           `json:"tolerance_band"`
}

// newestRecord reads the newest stored record of a window at or before
// asof straight from the store.
func newestRecord(t *testing.T, db *store.DB, id string, w rolling.WindowSpec, asof time.Time) rolling.Solution {
	t.Helper()
	var sol rolling.Solution
	err := db.History(id, w, time.Time{}, asof.Add(time.Nanosecond), func(r store.HistoryRecord) error {
		sol = r.Solution
		return nil
	})
	if err != nil || sol.N == 0 {
		t.Fatalf("no record of %s %v at or before %v: %v", id, w, asof, err)
	}
	return sol
}

// TestSensor_BandFromStoredCovariance checks the band drawn around the
// thermocouple's parabola (the model its lead-time limit judges) against
// the band computed here from the stored record: ŷ(τ) = c0 + c1·τ + c2·τ²
// and ŷ ± t·√(xᵀ·Cov·x), x = (1, τ, τ²) (Draper and Smith, Applied
// Regression Analysis, 3rd ed., section 5.3). The stored covariance is
// itself checked against rolling's prediction interval, whose half-width
// is t·√(s² + xᵀ·Cov·x) (same source).
func TestSensor_BandFromStoredCovariance(t *testing.T) {
	db, srv := demoServer(t)
	v := getJSON[sensorJSON](t, srv, "/api/sensors/"+idTC)
	if v.Model != "parabola" {
		t.Fatalf("model = %q, want parabola", v.Model)
	}
	for _, w := range demoWindows {
		sol := newestRecord(t, db, idTC, w, demoEnd)
		f := sol.Parabola
		var wv *struct {
			Window string    `json:"window"`
			Record time.Time `json:"record_time"`
			Judged bool      `json:"judged"`
			Fit    struct {
				Model string      `json:"model"`
				Coef  []float64   `json:"coef"`
				Cov   [][]float64 `json:"cov"`
				T     float64     `json:"t"`
			} `json:"fit"`
			Curve []web.CurvePoint `json:"curve"`
		}
		for i := range v.Windows {
			if v.Windows[i].Window == alert.WindowName(w) {
				wv = &v.Windows[i]
			}
		}
		if wv == nil || !wv.Record.Equal(sol.Last) || len(wv.Curve) < 10 {
			t.Fatalf("window %v missing, or record %v != stored %v", w, wv, sol.Last)
		}
		for _, p := range wv.Curve {
			tau := p.T.Sub(f.Last).Hours() / 24
			x := [3]float64{1, tau, tau * tau}
			var y, q float64
			for i := range 3 {
				y += f.Coef[i] * x[i]
				for j := range 3 {
					q += x[i] * f.Cov[i][j] * x[j]
				}
			}
			half := f.TCrit * math.Sqrt(q)
			for _, c := range []struct {
				name      string
				got, want float64
			}{{"fit", p.Fit, y}, {"low", p.Low, y - half}, {"high", p.High, y + half}} {
				if math.Abs(c.got-c.want) > 1e-9*math.Abs(c.want) {
					t.Errorf("window %v τ=%.4f %s = %.12g, want %.12g", w, tau, c.name, c.got, c.want)
				}
			}
			pr, err := f.Predict(p.T)
			if err != nil {
				t.Fatal(err)
			}
			pi := (pr.High - pr.Low) / 2 / f.TCrit
			if qq := pi*pi - f.ResidSD*f.ResidSD; math.Abs(qq-q) > 1e-7*(f.ResidSD*f.ResidSD) {
				t.Errorf("window %v τ=%.4f xᵀCx = %.10g, rolling's prediction interval implies %.10g", w, tau, q, qq)
			}
		}
	}
}

// TestSensor_AsOf checks that the page as of T shows the newest records
// at or before T, the events up to T, and the tickets as they stood at T.
func TestSensor_AsOf(t *testing.T) {
	db, srv := demoServer(t)
	long := demoWindows[1]
	// The pressure transmitter's first ticket, closed by its calibration.
	var first alert.Ticket
	err := db.Tickets(func(_ string, data []byte) error {
		var tk alert.Ticket
		if err := json.Unmarshal(data, &tk); err != nil {
			return err
		}
		if tk.Sensor == idPT && tk.Calibration != nil {
			first = tk
		}
		return nil
	})
	if err != nil || first.ID == "" {
		t.Fatalf("no closed ticket of %s in the demo: %v", idPT, err)
	}
	cal := first.Calibration.Time
	var evTimes []time.Time
	if err := db.Events(time.Time{}, time.Time{}, func(at time.Time, data []byte) error {
		var ev alert.Event
		if err := json.Unmarshal(data, &ev); err != nil {
			return err
		}
		if ev.Sensor == idPT {
			evTimes = append(evTimes, ev.At)
		}
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	mid := first.Opened.Add(cal.Sub(first.Opened) / 2)
	tests := []struct {
		name       string
		asof       time.Time
		wantTicket string // "": no ticket; else "open" or "closed"
	}{
		{"before the ticket", first.Opened.Add(-time.Second), ""},
		{"ticket open", mid, "open"},
		{"at the calibration", cal, "closed"},
		{"now", demoEnd, "closed"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			v := getJSON[sensorJSON](t, srv, "/api/sensors/"+idPT+"?asof="+tc.asof.Format(time.RFC3339Nano))
			if !v.AsOf.Equal(tc.asof) {
				t.Errorf("as_of = %v, want %v", v.AsOf, tc.asof)
			}
			sol := newestRecord(t, db, idPT, long, tc.asof)
			for _, w := range v.Windows {
				if w.Window == alert.WindowName(long) && (!w.Record.Equal(sol.Last) || w.Fit.Coef[0] != sol.Line.Coef[0]) {
					t.Errorf("14d/1d record %v level %v, want the stored %v level %v", w.Record, w.Fit.Coef[0], sol.Last, sol.Line.Coef[0])
				}
			}
			wantEvents := 0
			for _, at := range evTimes {
				if !at.After(tc.asof) {
					wantEvents++
				}
			}
			if len(v.Events) != wantEvents {
				t.Errorf("events = %d, want the %d stored at or before %v", len(v.Events), wantEvents, tc.asof)
			}
			var got *web.TicketView
			for i := range v.Tickets {
				if v.Tickets[i].ID == first.ID {
					got = &v.Tickets[i]
				}
			}
			switch {
			case tc.wantTicket == "" && got != nil:
				t.Errorf("ticket %s shown before it opened", first.ID)
			case tc.wantTicket == "open" && (got == nil || !got.Open || got.Calibration != nil):
				t.Errorf("ticket %+v, want it open with no calibration", got)
			case tc.wantTicket == "closed" && (got == nil || got.Open || got.Calibration == nil):
				t.Errorf("ticket %+v, want it closed by the calibration", got)
			}
			hasCal := false
			for _, c := range v.Calibrations {
				hasCal = hasCal || c.Time.Equal(cal)
			}
			if hasCal != !tc.asof.Before(cal) {
				t.Errorf("calibration at %v shown = %v as of %v", cal, hasCal, tc.asof)
			}
			// After the calibration the tolerance band centres on its
			// as-left value (1000), before it on the configured 1000 too;
			// the source says which.
			wantSrc := "configuration"
			if !tc.asof.Before(cal) {
				wantSrc = "calibration"
			}
			if v.AsLeft == nil || v.AsLeft.Source != wantSrc || v.AsLeft.Value != 1000 {
				t.Errorf("as-left = %+v, want 1000 from %s", v.AsLeft, wantSrc)
			}
		})
	}
	// One nanosecond before a record, the record before it is shown.
	sol := newestRecord(t, db, idPT, long, demoEnd)
	prev := newestRecord(t, db, idPT, long, sol.Last.Add(-time.Nanosecond))
	v := getJSON[sensorJSON](t, srv, "/api/sensors/"+idPT+"?asof="+sol.Last.Add(-time.Nanosecond).Format(time.RFC3339Nano))
	for _, w := range v.Windows {
		if w.Window == alert.WindowName(long) && !w.Record.Equal(prev.Last) {
			t.Errorf("as of 1 ns before %v: record %v, want %v", sol.Last, w.Record, prev.Last)
		}
	}
}

func TestSensor_IDsAndErrors(t *testing.T) {
	_, srv := demoServer(t)
	tests := []struct {
		name, path string
		status     int
		want       string // in the body
	}{
		{"dots", "/api/sensors/" + idPT, 200, `"id": "qm.u1.steam.pt-102"`},
		{"empty token", "/sensors/qm..pt-1", 400, "empty token at byte 3"},
		{"trailing dot", "/api/sensors/qm.pt-1.", 400, "trailing dot"},
		{"space", "/api/sensors/qm.pt%201", 400, "space at byte 5"},
		{"control byte", "/api/sensors/qm.pt%01", 400, "control byte 0x01"},
		{"wildcard", "/api/sensors/qm.*", 400, `wildcard '*'`},
		{"gt", "/sensors/" + url.PathEscape(idEvil), 400, "wildcard &#39;&gt;&#39; at byte 26"},
		{"unknown", "/sensors/qm.u9.none", 404, "is not known"},
		{"unknown json", "/api/sensors/qm.u9.none", 404, `"error": "sensor \"qm.u9.none\" is not known`},
		{"bad asof", "/api/sensors/" + idPT + "?asof=yesterday", 400, `asof=\"yesterday\"`},
		{"bad format", "/sensors/" + idPT + "?format=xml", 400, "want html, csv or json"},
		{"no page", "/nowhere", 404, "no page at /nowhere"},
		{"hostile id escaped", "/sensors/" + url.PathEscape(idOdd), 200, "qm.u5.&#34;&lt;i&amp;&#39;x/y"},
		{"json suffix", "/sensors/" + idPT + ".json", 200, `"id": "qm.u1.steam.pt-102"`},
		{"csv suffix", "/sensors/" + idPT + ".csv", 200, "record,sensor,time,window"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			st, body := get(t, srv, tc.path)
			if st != tc.status || !strings.Contains(body, tc.want) {
				t.Errorf("GET %s = %d, body has %q: %v; want %d\n%.400s", tc.path, st, tc.want, strings.Contains(body, tc.want), tc.status, body)
			}
			if strings.Contains(body, `"<i&'x`) {
				t.Errorf("GET %s: the hostile id appears unescaped", tc.path)
			}
		})
	}
	// The fleet links the hostile id with its path escaped, and the
	// link leads to it.
	_, body := get(t, srv, "/")
	href := "/sensors/" + url.PathEscape(idOdd)
	if !strings.Contains(body, `href="`+strings.ReplaceAll(href, "&", "&amp;")+`"`) && !strings.Contains(body, `href="`+href+`"`) {
		t.Errorf("fleet page has no link %s", href)
	}
}

func TestSensor_CSVHoldsWhatIsShown(t *testing.T) {
	db, srv := demoServer(t)
	v := getJSON[sensorJSON](t, srv, "/api/sensors/"+idGD)
	st, body := get(t, srv, "/sensors/"+idGD+".csv")
	if st != 200 {
		t.Fatalf("csv: %d", st)
	}
	recs, err := csv.NewReader(strings.NewReader(body)).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	count := map[string]int{}
	for _, r := range recs[1:] {
		count[r[0]]++
	}
	stored := 0
	if err := db.History(idGD, rolling.WindowSpec{}, v.From, demoEnd.Add(time.Nanosecond), func(store.HistoryRecord) error {
		stored++
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	if count["history"] != stored || count["fit"] != len(v.Windows) || count["event"] != len(v.Events) || count["ticket"] != len(v.Tickets) {
		t.Errorf("csv rows %v, want %d history (stored since %v), %d fit, %d event, %d ticket", count, stored, v.From, len(v.Windows), len(v.Events), len(v.Tickets))
	}
	if len(v.History) != stored {
		t.Errorf("json history %d rows, want %d", len(v.History), stored)
	}
}

func TestHandler_Token(t *testing.T) {
	db := openDB(t)
	fillDemo(t, db)
	srv := newServer(t, web.Options{DB: db, Rule: ruleFunc(demoRules()), Token: "s3cret-t0ken", Now: func() time.Time { return demoEnd }})
	tests := []struct {
		name, path string
		hdr        []string
		status     int
	}{
		{"no token api", "/api/fleet", nil, 401},
		{"no token page", "/", nil, 401},
		{"wrong token", "/api/fleet", []string{"Authorization", "Bearer nope"}, 401},
		{"bearer", "/api/fleet", []string{"Authorization", "Bearer s3cret-t0ken"}, 200},
		{"cookie", "/sensors/" + idPT, []string{"Cookie", "driftfit_token=s3cret-t0ken"}, 200},
		{"style sheet for the login page", "/assets/style.css", nil, 200},
		{"script needs the token", "/assets/fleet.js", nil, 401},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			if st, body := get(t, srv, tc.path, tc.hdr...); st != tc.status {
				t.Errorf("GET %s = %d, want %d\n%.300s", tc.path, st, tc.status, body)
			}
		})
	}
	client := srv.Client()
	client.CheckRedirect = func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }
	for _, tc := range []struct {
		token, next string
		status      int
		location    string
	}{
		{"s3cret-t0ken", "/sensors/" + idPT, 303, "/sensors/" + idPT},
		{"s3cret-t0ken", "//elsewhere.example.invalid/", 303, "/"},
		{"guess", "/", 401, ""},
	} {
		res, err := client.PostForm(srv.URL+"/login", url.Values{"token": {tc.token}, "next": {tc.next}})
		if err != nil {
			t.Fatal(err)
		}
		res.Body.Close()
		if res.StatusCode != tc.status || res.Header.Get("Location") != tc.location {
			t.Errorf("login(%q, next %q) = %d to %q, want %d to %q", tc.token, tc.next, res.StatusCode, res.Header.Get("Location"), tc.status, tc.location)
		}
		if tc.status == 303 {
			var set bool
			for _, c := range res.Cookies() {
				set = set || c.Name == "driftfit_token" && c.HttpOnly && c.SameSite == http.SameSiteStrictMode
			}
			if !set {
				t.Errorf("login: no HttpOnly, SameSite=Strict token cookie in %v", res.Cookies())
			}
		}
	}
}
