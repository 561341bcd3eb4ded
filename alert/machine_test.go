package alert_test

import (
	"errors"
	"strings"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

// step is one evaluation of a synthetic slope fit: drift c1 per day with
// standard error se, at day i after t0 for step i unless given, and the event type it must produce ("" for none) and the
// state after it.
type step struct {
	c1, se float64
	sparse bool          // coverage below the rule's minimum: not evaluable
	day    time.Duration // when, after t0; zero: one evaluation a day
	want   string
	state  alert.State
	sev    alert.Severity
}

// With L_w = 0.1, L_c = 0.2 /d and t(28) = 2.048: se = 0.01 gives a
// half-width of 0.0205, so c1 = 0.15 has lower bound 0.1295 > 0.1
// (warning breach); c1 = 0.25 → 0.2295 > 0.2 (critical breach);
// c1 = 0.09 → 0.0695: no breach, and 0.09 ≥ 0.8·0.1 = 0.08 keeps firing;
// c1 = 0.05 < 0.08 clears.
const (
	warnC1  = 0.15
	critC1  = 0.25
	holdC1  = 0.09
	clearC1 = 0.05
	se      = 0.01
)

func TestTracker_Evaluate_StateMachine(t *testing.T) {
	b := func(c1 float64, want string, st alert.State, sev alert.Severity) step {
		return step{c1: c1, se: se, want: want, state: st, sev: sev}
	}
	none := alert.SeverityUnknown
	tests := []struct {
		name     string
		cooldown time.Duration
		steps    []step
	}{
		{"debounce needs three consecutive breaches", 0, []step{
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "raised", alert.Firing, alert.Warning),
			b(warnC1, "", alert.Firing, alert.Warning),
		}},
		{"a gap in breaches restarts the count", 0, []step{
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "", alert.Pending, none),
			b(clearC1, "", alert.Inactive, none),
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "raised", alert.Firing, alert.Warning),
		}},
		{"a sparse window restarts the count but keeps firing", 0, []step{
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "", alert.Pending, none),
			{c1: warnC1, se: se, sparse: true, state: alert.Inactive},
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "raised", alert.Firing, alert.Warning),
			{c1: clearC1, se: se, sparse: true, state: alert.Firing, sev: alert.Warning},
		}},
		{"hysteresis: below the limit but above the clear level keeps firing", 0, []step{
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "raised", alert.Firing, alert.Warning),
			b(holdC1, "", alert.Firing, alert.Warning),
			b(holdC1, "", alert.Firing, alert.Warning),
			b(clearC1, "cleared", alert.Inactive, none),
		}},
		{"negative drift is judged by its magnitude", 0, []step{
			b(-warnC1, "", alert.Pending, none),
			b(-warnC1, "", alert.Pending, none),
			b(-warnC1, "raised", alert.Firing, alert.Warning),
			b(-holdC1, "", alert.Firing, alert.Warning),
			b(-clearC1, "cleared", alert.Inactive, none),
		}},
		{"escalation needs three consecutive critical breaches", 0, []step{
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "raised", alert.Firing, alert.Warning),
			b(critC1, "", alert.Firing, alert.Warning),
			b(critC1, "", alert.Firing, alert.Warning),
			b(critC1, "escalated", alert.Firing, alert.Critical),
			b(warnC1, "", alert.Firing, alert.Critical),
			b(clearC1, "cleared", alert.Inactive, none),
		}},
		{"three critical breaches raise at critical", 0, []step{
			b(critC1, "", alert.Pending, none),
			b(critC1, "", alert.Pending, none),
			b(critC1, "raised", alert.Firing, alert.Critical),
		}},
		{"mixed breaches raise at warning", 0, []step{
			b(critC1, "", alert.Pending, none),
			b(warnC1, "", alert.Pending, none),
			b(critC1, "raised", alert.Firing, alert.Warning),
		}},
		{"cooldown blocks a new raise until it has passed", 96 * time.Hour, []step{
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "", alert.Pending, none),
			b(warnC1, "raised", alert.Firing, alert.Warning),                       // day 2
			b(clearC1, "cleared", alert.Resolved, none),                            // day 3: cooling until day 7
			b(warnC1, "", alert.Pending, none),                                     // day 4
			b(warnC1, "", alert.Pending, none),                                     // day 5
			b(warnC1, "", alert.Pending, none),                                     // day 6: three breaches, still cooling
			b(warnC1, "raised", alert.Firing, alert.Warning),                       // day 7 = day 3 + 96h
			b(clearC1, "cleared", alert.Resolved, none),                            // day 8
			b(clearC1, "", alert.Resolved, none),                                   // day 9
			{c1: clearC1, se: se, day: 12 * 24 * time.Hour, state: alert.Inactive}, // day 8 + 96h
		}},
		{"a wide interval cannot breach: significance floor", 0, []step{
			// se = 0.2: half-width 0.41; c1 = 0.6 has lower bound 0.19 > 0.1
			// but not above the half-width, so no evidence of drift.
			{c1: 0.6, se: 0.2, state: alert.Inactive},
			{c1: 0.6, se: 0.2, state: alert.Inactive},
			{c1: 0.6, se: 0.2, state: alert.Inactive},
			// c1 = 1.0: lower bound 0.59 > 0.41, breach (critical: > 0.2).
			{c1: 1.0, se: 0.2, state: alert.Pending},
		}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			r := alert.DefaultRule()
			r.Tolerance = 1
			r.Windows = []rolling.WindowSpec{month}
			r.Cooldown = tc.cooldown
			r.Limits.Slope = alert.RateLimit{Warning: 0.1, Critical: 0.2}
			tr := mustTracker(t, "qm.u2.pt-7", r)
			for i, s := range tc.steps {
				now := t0.Add(time.Duration(i) * 24 * time.Hour)
				if s.day != 0 {
					now = t0.Add(s.day)
				}
				sol := lineSol(month, now, s.c1, s.se)
				if s.sparse {
					sol.Filled = sol.Panes / 4
				}
				d, err := tr.Evaluate(now, &sol)
				if err != nil {
					t.Fatalf("step %d: %v", i, err)
				}
				var got []string
				for _, e := range d.Events {
					got = append(got, e.Type.String())
				}
				if strings.Join(got, ",") != s.want {
					t.Errorf("step %d (c1=%v): events %v, want %q", i, s.c1, got, s.want)
				}
				st := tr.Alerts()
				if len(st) != 1 || st[0].State != s.state || st[0].Severity != s.sev {
					t.Errorf("step %d (c1=%v): alerts %+v, want state %v severity %v", i, s.c1, st, s.state, s.sev)
				}
			}
		})
	}
}

// TestTracker_Evaluate_EventFields checks the numbers an event carries
// against the fit they came from.
func TestTracker_Evaluate_EventFields(t *testing.T) {
	r := alert.DefaultRule()
	r.Class, r.Unit, r.Tolerance = "dp-transmitter", "kPa", 1
	r.Windows = []rolling.WindowSpec{month}
	r.Debounce = 1
	r.Limits.Slope = alert.RateLimit{Warning: 0.1, Critical: 0.2}
	tr := mustTracker(t, "qm.u2.pt-7", r)
	sol := lineSol(month, t0, warnC1, se)
	d, err := tr.Evaluate(t0, &sol)
	if err != nil || len(d.Events) != 1 {
		t.Fatalf("Evaluate = %+v, %v; want one event", d, err)
	}
	e := d.Events[0]
	wantLo := warnC1 - tcrit28*se // 0.15 − 2.048407·0.01
	if e.Type != alert.Raised || e.Kind != alert.Slope || e.Severity != alert.Warning || e.Model != "line" ||
		e.Value != warnC1 || e.CI[0] != wantLo || e.Limit != 0.1 || e.Unit != "kPa/d" || e.N != 30 ||
		e.Window != "30d/1d" || e.Class != "dp-transmitter" || !e.Last.Equal(t0) || e.Caution != alert.Caution {
		t.Errorf("event = %+v", e)
	}
}

func TestTracker_Evaluate_Errors(t *testing.T) {
	r := alert.DefaultRule()
	r.Tolerance = 1
	r.Limits.Slope.Critical = 0.1
	tr := mustTracker(t, "s", r)
	other := rolling.WindowSpec{Span: 7 * 24 * time.Hour, Pane: time.Hour}
	sol := lineSol(other, t0, 0, se)
	if _, err := tr.Evaluate(t0, &sol); !errors.Is(err, alert.ErrUnknownWindow) {
		t.Errorf("Evaluate(window 7d/1h) error = %v, want ErrUnknownWindow", err)
	}
	sol = lineSol(month, t0, 0, se)
	if _, err := tr.Evaluate(time.Time{}, &sol); !errors.Is(err, alert.ErrBadTime) {
		t.Errorf("Evaluate(zero time) error = %v, want ErrBadTime", err)
	}
	if _, err := tr.Calibrate(alert.Calibration{Time: t0, AsFound: 1, AsLeft: 0}); err != nil {
		t.Fatal(err)
	}
	// A fit whose readings start before the calibration mixes both.
	if _, err := tr.Evaluate(t0.Add(time.Hour), &sol); !errors.Is(err, alert.ErrStale) {
		t.Errorf("Evaluate(fit from before the calibration) error = %v, want ErrStale", err)
	}
	if _, err := tr.Calibrate(alert.Calibration{Time: t0.Add(-time.Hour)}); !errors.Is(err, alert.ErrBadCalibration) {
		t.Errorf("Calibrate(earlier time) error = %v, want ErrBadCalibration", err)
	}
}
