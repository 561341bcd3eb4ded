package alert_test

import (
	"fmt"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

// A pressure transmitter left at 100 kPa (tolerance ±1 kPa) drifts up by
// 0.2 kPa a day, read hourly; its 30-day window of daily panes is judged
// at every pane close. The slope warning level 0.05 kPa/d is breached
// from the first evaluation the gates allow (30 readings, half the panes:
// day 15), and the critical level 0.1 kPa/d too, so after three
// evaluations the alert is raised at critical and a ticket opens. By hand:
// the level is then 100 + 0.2·17 = 103.4 kPa, already above 101, so the
// ticket is due at once.
func ExampleTracker_Evaluate() {
	r := alert.DefaultRule()
	r.Unit, r.Tolerance = "kPa", 1
	r.AsLeft, r.HasAsLeft = 100, true
	r.Windows = []rolling.WindowSpec{{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour}}
	r.Limits.Slope = alert.RateLimit{Warning: 0.05, Critical: 0.1}
	tr, err := alert.NewTracker("qm.u1.steam.pt-102", r)
	if err != nil {
		panic(err)
	}
	s, err := rolling.NewSensor(r.Windows...)
	if err != nil {
		panic(err)
	}
	start := time.Date(2026, 4, 1, 0, 0, 0, 0, time.UTC)
	for i := range 20 * 24 {
		at := start.Add(time.Duration(i) * time.Hour)
		if s.Closes(at.UnixNano()) != 0 {
			sol := s.Solve(0)
			d, err := tr.Evaluate(at, &sol)
			if err != nil {
				panic(err)
			}
			for _, e := range d.Events {
				fmt.Printf("%s %s %s %s: %.3f %s (95%% CI %.3f..%.3f), limit %g\n",
					e.At.Format(time.DateOnly), e.Window, e.Kind, e.Type, e.Value, e.Unit, e.CI[0], e.CI[1], e.Limit)
			}
			if tk := d.Opened; tk != nil {
				fmt.Printf("ticket %s: due %s (%s), as-found %+.2f kPa\n", tk.ID, tk.Due.Format(time.DateOnly), tk.DueBasis, tk.AsFound.Deviation)
			}
		}
		wiggle := 0.05 * float64(i%5-2) // a small repeating disturbance
		if err := s.Add(rolling.Reading{UnixNano: at.UnixNano(), Value: 100 + 0.2*float64(i)/24 + wiggle}); err != nil {
			panic(err)
		}
	}
	// Output:
	// 2026-04-18 30d/1d slope raised: 0.200 kPa/d (95% CI 0.199..0.201), limit 0.1
	// ticket qm.u1.steam.pt-102@20260418T000000Z: due 2026-04-18 (already_out), as-found +3.40 kPa
}

// Three thermocouples in one zone: each is compared with the median of
// the other two, so a change of the zone's temperature cancels.
func ExampleDeviations() {
	vals := []float64{101.2, 100.9, 103.0}
	live := []bool{true, true, true}
	devs, err := alert.Deviations(nil, vals, live)
	if err != nil {
		panic(err)
	}
	for i, d := range devs {
		fmt.Printf("member %d: %+.2f (peers %d)\n", i, d.Value, d.Peers)
	}
	// One member left: it falls back to its own signal.
	devs, _ = alert.Deviations(devs, vals, []bool{false, true, false})
	fmt.Printf("member 1 alone: %.2f own=%v\n", devs[1].Value, devs[1].Own)
	// Output:
	// member 0: -0.75 (peers 2)
	// member 1: -1.20 (peers 2)
	// member 2: +1.95 (peers 2)
	// member 1 alone: 100.90 own=true
}
