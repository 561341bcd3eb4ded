package web_test

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"path/filepath"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
	"driftfit/store"
)

// The demo plant is invented: Quillmere Vale, its units and sensors.

// demoStart and demoEnd bound the demo readings: 30 days.
var (
	demoStart = time.Date(2026, 11, 1, 0, 0, 0, 0, time.UTC)
	demoEnd   = demoStart.Add(30 * 24 * time.Hour)
)

const (
	idPT   = "qm.u1.steam.pt-102"
	idGD   = "qm.u2.pumpbay.gd-502"
	idTT   = "qm.u1.steam.tt-201"
	idTC   = "qm.u3.furnace.tc-7"
	idRef  = "qm.u4.lab.ref-01"
	idFM   = "qm.u4.lab.fm-9"
	idEvil = `qm.u5.<svg/onload=alert(1)>` // not a valid id: '>' is a wildcard
	idOdd  = `qm.u5."<i&'x/y`              // valid, and hostile to HTML and paths
)

var demoWindows = []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}, {Span: 14 * 24 * time.Hour, Pane: 24 * time.Hour}}

type demoSensor struct {
	id    string
	rule  *alert.Rule // nil: no rule
	every time.Duration
	from  time.Time // first reading; zero: demoStart
	value func(days float64, rng *rand.Rand) float64
	// calibrate, if not zero, records a calibration then (as-found the
	// fitted level, as-left asLeft) and restarts the fits.
	calibrate time.Time
	asLeft    float64
}

func baseRule(class, unit string, tol float64) *alert.Rule {
	r := alert.DefaultRule()
	r.Class, r.Unit, r.Tolerance = class, unit, tol
	r.Windows = demoWindows
	r.MinReadings, r.MinCoverage, r.Debounce = 20, 0.5, 2
	return &r
}

func demoSensors() []demoSensor {
	pt := baseRule("pressure-transmitter", "kPa", 2.5)
	pt.AsLeft, pt.HasAsLeft = 1000, true
	pt.Limits.Slope = alert.RateLimit{Warning: 0.1, Critical: 0.3}
	pt.Limits.LeadTime = alert.DurationLimit{Warning: 30 * 24 * time.Hour, Critical: 7 * 24 * time.Hour}
	gd := baseRule("gas-detector", "%LEL", 3)
	gd.Limits.Slope = alert.RateLimit{Warning: 0.1, Critical: 0.25}
	tt := baseRule("temperature", "degC", 2)
	tt.Limits.Slope = alert.RateLimit{Warning: 0.05, Critical: 0.2}
	tc := baseRule("thermocouple", "degC", 6)
	tc.TrendModel = rolling.Parabola
	tc.Limits.LeadTime = alert.DurationLimit{Warning: 30 * 24 * time.Hour, Critical: 7 * 24 * time.Hour}
	ref := baseRule("reference", "kPa", 1)
	ref.Limits.Slope = alert.RateLimit{Critical: 0.5}
	odd := baseRule("temperature", "degC", 2)
	odd.Limits.Slope = alert.RateLimit{Warning: 0.05}
	m := 20 * time.Minute
	return []demoSensor{
		{id: idPT, rule: pt, every: m, value: func(d float64, rng *rand.Rand) float64 {
			// 0.25 kPa/day drift; calibrated back to 1000 on day 18.
			if d >= 18 {
				return 1000 + 0.25*(d-18) + 0.6*rng.NormFloat64()
			}
			return 1000 + 0.25*d + 0.6*rng.NormFloat64()
		}, calibrate: demoStart.Add(18 * 24 * time.Hour), asLeft: 1000},
		{id: idGD, rule: gd, every: m, value: func(d float64, rng *rand.Rand) float64 {
			return 2 + 0.12*d + 0.3*rng.NormFloat64()
		}},
		{id: idTT, rule: tt, every: m, value: func(d float64, rng *rand.Rand) float64 {
			return 180 + 0.5*rng.NormFloat64()
		}},
		{id: idTC, rule: tc, every: m, value: func(d float64, rng *rand.Rand) float64 {
			return 650 + 0.004*d*d + 0.4*rng.NormFloat64()
		}},
		{id: idRef, rule: ref, every: time.Hour, from: demoEnd.Add(-10 * time.Hour), value: func(d float64, rng *rand.Rand) float64 {
			return 101.3 + 0.05*rng.NormFloat64()
		}},
		{id: idFM, every: m, value: func(d float64, rng *rand.Rand) float64 {
			return 42 + 2*math.Sin(2*math.Pi*d) + 0.5*rng.NormFloat64()
		}},
		{id: idOdd, rule: odd, every: time.Hour, value: func(d float64, rng *rand.Rand) float64 {
			return 20 + 0.2*rng.NormFloat64()
		}},
	}
}

func demoRules() map[string]alert.Rule {
	m := map[string]alert.Rule{}
	for _, s := range demoSensors() {
		if s.rule != nil {
			m[s.id] = *s.rule
		}
	}
	return m
}

func ruleFunc(m map[string]alert.Rule) func(string) (alert.Rule, bool) {
	return func(id string) (alert.Rule, bool) {
		r, ok := m[id]
		return r, ok
	}
}

func openDB(t testing.TB) *store.DB {
	t.Helper()
	db, err := store.Open(filepath.Join(t.TempDir(), "driftfit.db"), store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		if err := db.Check(); err != nil {
			t.Errorf("store check: %v", err)
		}
		if err := db.Close(); err != nil {
			t.Error(err)
		}
	})
	return db
}

// fillDemo feeds the demo sensors' readings through rolling sensors,
// stores a fit record at every pane close (as ingest does, just before
// the reading that closes it), judges each with an alert.Tracker as the
// service does at pane close, and stores the events and tickets and, at
// the end, each sensor's panes. The seed is fixed (1) and printed.
//
// It returns the readings each sensor's stored state was fed: those
// since its last restart.
func fillDemo(t testing.TB, db *store.DB) map[string][]rolling.Reading {
	t.Helper()
	t.Logf("demo seed 1")
	rng := rand.New(rand.NewPCG(1, 2))
	fed := map[string][]rolling.Reading{}
	var b store.Batch
	for _, ds := range demoSensors() {
		s, err := rolling.NewSensor(demoWindows...)
		if err != nil {
			t.Fatal(err)
		}
		var tr *alert.Tracker
		if ds.rule != nil {
			if tr, err = alert.NewTracker(ds.id, *ds.rule); err != nil {
				t.Fatal(err)
			}
		}
		var writes []store.AlertWrite
		keep := func(d alert.Decision) {
			w := store.AlertWrite{Sensor: ds.id}
			for _, ev := range d.Events {
				data, err := json.Marshal(ev)
				if err != nil {
					t.Fatal(err)
				}
				w.Events = append(w.Events, store.TimedValue{At: ev.At, Data: data})
			}
			for _, tk := range []*alert.Ticket{d.Opened, d.Closed} {
				if tk == nil {
					continue
				}
				data, err := json.Marshal(tk)
				if err != nil {
					t.Fatal(err)
				}
				if w.Tickets == nil {
					w.Tickets = map[string][]byte{}
				}
				w.Tickets[tk.ID] = data
			}
			if len(w.Events) > 0 || len(w.Tickets) > 0 {
				writes = append(writes, w)
			}
		}
		from := ds.from
		if from.IsZero() {
			from = demoStart
		}
		calibrated := ds.calibrate.IsZero()
		for at := from; at.Before(demoEnd); at = at.Add(ds.every) {
			if !calibrated && !at.Before(ds.calibrate) {
				calibrated = true
				sol := s.Solve(1)
				d, err := tr.Calibrate(alert.Calibration{Time: ds.calibrate, AsFound: sol.Line.Coef[0], AsLeft: ds.asLeft})
				if err != nil {
					t.Fatal(err)
				}
				keep(d)
				if s, err = rolling.NewSensor(demoWindows...); err != nil {
					t.Fatal(err)
				}
				fed[ds.id] = nil
			}
			ns := at.UnixNano()
			closes := s.Closes(ns)
			for i := range demoWindows {
				if closes&(1<<i) == 0 {
					continue
				}
				sol := s.Solve(i)
				if sol.N == 0 {
					continue
				}
				if err := b.Record(ds.id, &sol); err != nil {
					t.Fatal(err)
				}
				if tr != nil {
					d, err := tr.Evaluate(sol.Last, &sol)
					if err != nil {
						t.Fatalf("Evaluate(%s, %v): %v", ds.id, sol.Last, err)
					}
					keep(d)
				}
			}
			r := rolling.Reading{UnixNano: ns, Value: ds.value(at.Sub(demoStart).Hours()/24, rng)}
			if err := s.Add(r); err != nil {
				t.Fatal(err)
			}
			fed[ds.id] = append(fed[ds.id], r)
		}
		// The panes of the windows as they stand at the end, as the
		// service commits a sensor's state.
		if err := b.Sensor(ds.id, s); err != nil {
			t.Fatal(err)
		}
		if _, err := db.Commit(&b); err != nil {
			t.Fatal(err)
		}
		if len(writes) > 0 {
			if err := db.WriteAlerts(writes); err != nil {
				t.Fatal(err)
			}
		}
	}
	return fed
}
