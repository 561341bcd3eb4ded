package alert_test

import (
	"errors"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

func TestTracker_Evaluate_Judgement(t *testing.T) {
	r := alert.DefaultRule()
	r.Tolerance, r.Limits.Slope.Warning = 1, 0.1
	sparse := lineSol(month, t0, 0, 0.01)
	sparse.Filled = 10 // coverage 10/30 = 0.33
	few := lineSol(month, t0, 0, 0.01)
	few.N = 12
	ill := lineSol(month, t0, 0, 0.01)
	ill.Line.Cond = 1e6
	singular := lineSol(month, t0, 0, 0.01)
	singular.Line = rolling.Fit{Model: rolling.Line, Err: rolling.ErrSingular}
	good := lineSol(month, t0, 0, 0.01)
	tests := []struct {
		name  string
		sol   rolling.Solution
		peers *[2]int
		want  alert.Reason
		text  string
	}{
		{"judged", good, nil, alert.Judged, "30d/1d judged"},
		{"too few readings", few, nil, alert.TooFewReadings, "n 12 < 30"},
		{"coverage", sparse, nil, alert.LowCoverage, "coverage 0.33 < 0.50"},
		{"ill-conditioned", ill, nil, alert.IllConditioned, "cond 1e+06"},
		{"singular", singular, nil, alert.IllConditioned, "ill-conditioned"},
		{"peers incomplete", good, &[2]int{1, 2}, alert.PeersIncomplete, "1 of 2 needed"},
		{"peers complete", good, &[2]int{3, 2}, alert.Judged, "judged"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			tr := mustTracker(t, "qm.x", r)
			var d alert.Decision
			var err error
			if tc.peers != nil {
				d, err = tr.EvaluatePeers(t0, &tc.sol, tc.peers[0], tc.peers[1])
			} else {
				d, err = tr.Evaluate(t0, &tc.sol)
			}
			if err != nil {
				t.Fatal(err)
			}
			j := d.Judgement
			if j.Reason != tc.want || j.OK() != (tc.want == alert.Judged) || !strings.Contains(j.String(), tc.text) || j.Window != month {
				t.Errorf("Judgement = %v (%s), want %v containing %q", j.Reason, j, tc.want, tc.text)
			}
			b, err := j.Reason.MarshalText()
			var back alert.Reason
			if err != nil || back.UnmarshalText(b) != nil || back != j.Reason {
				t.Errorf("Reason %v text round trip: %q, %v -> %v", j.Reason, b, err, back)
			}
		})
	}
	// A window not judged gives no evidence: a strong drift on a sparse
	// window raises nothing, and the same drift judged does (Debounce 1).
	r.Debounce = 1
	strong := lineSol(month, t0, 1, 0.01)
	strong.Filled = 10
	tr := mustTracker(t, "qm.x", r)
	if d, _ := tr.Evaluate(t0, &strong); len(d.Events) != 0 {
		t.Errorf("not judged, yet events %v", d.Events)
	}
	strong.Filled = 30
	if d, _ := tr.Evaluate(t0.Add(day), &strong); len(d.Events) != 1 || d.Events[0].Type != alert.Raised {
		t.Errorf("judged strong drift: events %v, want one raise", d.Events)
	}
	if !(alert.Judgement{Window: month, Reason: alert.LowCoverage, N: 3}).Same(alert.Judgement{Window: month, Reason: alert.LowCoverage, N: 9}) {
		t.Errorf("Same: the numbers should not matter")
	}
}

// TestFlatlineDetector: readings every 10 minutes; a run counts as
// stuck once it spans For (1 h) and MinCount (4) readings within the
// resolution. The 7 values 5.00, 5.01, 5.00, 5.01, 5.00, 5.01, 5.00 at
// resolution 0.01 are one run: stuck from the 7th reading on (60 min,
// 7 readings); a reading of 5.03 widens the spread to 0.03 and starts
// a new run.
func TestFlatlineDetector(t *testing.T) {
	d, err := alert.NewFlatlineDetector(alert.FlatlineSettings{For: time.Hour, MinCount: 4, Resolution: 0.01})
	if err != nil {
		t.Fatal(err)
	}
	vals := []float64{5.00, 5.01, 5.00, 5.01, 5.00, 5.01, 5.00, 5.03}
	want := []bool{false, false, false, false, false, false, true, false}
	for i, v := range vals {
		at := t0.Add(time.Duration(i) * 10 * time.Minute)
		r := d.Update(at, v)
		if r.Active != want[i] {
			t.Errorf("reading %d (%v): active %v, want %v (%+v)", i, v, r.Active, want[i], r)
		}
		if i == 6 && (!r.Since.Equal(t0) || r.Value != 1.0/24 || r.N != 7) {
			t.Errorf("reading 6: %+v, want since %v, 1/24 d, 7 readings", r, t0)
		}
		if i == 7 && r.N != 1 {
			t.Errorf("reading 7: run of %d, want a new run of 1", r.N)
		}
	}
	// Exact equality at resolution 0: a change of one ulp starts anew.
	e, _ := alert.NewFlatlineDetector(alert.FlatlineSettings{For: time.Minute, MinCount: 2})
	e.Update(t0, 1)
	if r := e.Update(t0.Add(time.Minute), math.Nextafter(1, 2)); r.Active {
		t.Errorf("resolution 0: values one ulp apart count as stuck")
	}
	if _, err := alert.NewFlatlineDetector(alert.FlatlineSettings{For: time.Hour, MinCount: 1}); !errors.Is(err, alert.ErrBadRule) ||
		!strings.Contains(err.Error(), "MinCount") {
		t.Errorf("NewFlatlineDetector(MinCount 1) error = %v, want ErrBadRule naming MinCount", err)
	}
}

// TestSpikeDetector: N(0, 1) errors, seeded. |e| of N(0, 1) has mean
// √(2/π) and SD √(1 − 2/π), a ratio of √(π/2 − 1) = 0.755, so the
// robust scale over about 63 effective readings has a relative SE near
// 0.755/√63 = 0.095; the test allows 0.3, three SE. Errors of 10 are
// spikes; three within an hour raise the spike alert; MaxRun caps
// consecutive rejections so a change of level gets into the fits on
// the fourth reading.
func TestSpikeDetector(t *testing.T) {
	const seed = 5
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	d, err := alert.NewSpikeDetector(alert.SpikeSettings{K: 6})
	if err != nil {
		t.Fatal(err)
	}
	at := t0
	for range 500 {
		at = at.Add(time.Minute)
		if r := d.Update(at, rng.NormFloat64()); r.Spike {
			t.Fatalf("N(0, 1) error judged a spike at K 6: %+v", r)
		}
	}
	if s, ok := d.Scale(); !ok || math.Abs(s-1) > 0.3 {
		t.Errorf("Scale() = %v, %v; want about 1", s, ok)
	}
	var last alert.SpikeResult
	for i := range 3 {
		at = at.Add(time.Minute)
		last = d.Update(at, 10)
		if !last.Spike {
			t.Errorf("error 10 (%d): not a spike (%+v)", i, last)
		}
		at = at.Add(time.Minute)
		d.Update(at, rng.NormFloat64())
	}
	if !last.Active || last.N != 3 || last.Value < 6 {
		t.Errorf("three spikes in an hour: %+v, want the alert active with 3 spikes", last.Result)
	}
	// Two hours of quiet clear it.
	for range 120 {
		at = at.Add(time.Minute)
		last = d.Update(at, rng.NormFloat64())
	}
	if last.Active {
		t.Errorf("after 2 quiet hours: still active %+v", last.Result)
	}
	// A step of 20: three readings rejected, the fourth accepted.
	for i := range 4 {
		at = at.Add(time.Minute)
		r := d.Update(at, 20)
		if r.Spike != (i < 3) {
			t.Errorf("step reading %d: spike %v, want %v (MaxRun 3)", i, r.Spike, i < 3)
		}
	}
	// Warm-up: nothing is judged before 30 errors.
	w, _ := alert.NewSpikeDetector(alert.SpikeSettings{K: 6})
	for i := range 29 {
		w.Update(at, 1)
		if r := w.Update(at, 1e6); r.Spike {
			t.Fatalf("warm-up error %d judged a spike", i)
		}
	}
}

func TestSilenceAndSpan(t *testing.T) {
	tests := []struct {
		name   string
		got    alert.Result
		active bool
		value  float64
		limit  float64
	}{
		{"silent after 6 h", alert.Silence(t0.Add(6*time.Hour), t0, 6*time.Hour), true, 0.25, 0.25},
		{"not yet silent", alert.Silence(t0.Add(5*time.Hour), t0, 6*time.Hour), false, 5.0 / 24, 0.25},
		{"never a reading", alert.Silence(t0, time.Time{}, time.Hour), false, 0, 1.0 / 24},
		{"above span", alert.SpanCheck(t0, 1001, 0, 1000), true, 1001, 1000},
		{"below span", alert.SpanCheck(t0, -0.5, 0, 1000), true, -0.5, 0},
		{"inside, nearer the top", alert.SpanCheck(t0, 900, 0, 1000), false, 900, 1000},
		{"on the bound", alert.SpanCheck(t0, 1000, 0, 1000), false, 1000, 1000},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			if tc.got.Active != tc.active || math.Abs(tc.got.Value-tc.value) > 1e-12 || tc.got.Limit != tc.limit {
				t.Errorf("%s = %+v, want active %v value %v limit %v", tc.name, tc.got, tc.active, tc.value, tc.limit)
			}
		})
	}
}

func TestTracker_Observe(t *testing.T) {
	r := alert.DefaultRule()
	r.Unit, r.Tolerance, r.SpanLower, r.SpanUpper = "kPa", 1, 0, 250
	r.Limits.Slope.Warning = 0.1
	r.Detect = alert.Detectors{Step: alert.StepSettings{On: true}, Flatline: alert.FlatlineSettings{For: time.Hour},
		Silent: 6 * time.Hour, OutOfSpan: true}
	r.Cooldown = 0

	t.Run("raise and clear, per sensor", func(t *testing.T) {
		tr := mustTracker(t, "qm.x", r)
		f := alert.Finding{Kind: alert.Silent, Result: alert.Silence(t0.Add(7*time.Hour), t0, 6*time.Hour)}
		d, err := tr.Observe(t0.Add(7*time.Hour), f)
		if err != nil {
			t.Fatal(err)
		}
		if len(d.Events) != 1 {
			t.Fatalf("events %v, want one raise", d.Events)
		}
		e := d.Events[0]
		if e.Type != alert.Raised || e.Kind != alert.Silent || e.Window != "" || e.Unit != "d" || e.Value != 7.0/24 ||
			!e.First.Equal(t0) || e.Severity != alert.Warning || d.Opened != nil {
			t.Errorf("silent raise = %+v", e)
		}
		// Still silent: no new event.
		if d, _ := tr.Observe(t0.Add(8*time.Hour), f); len(d.Events) != 0 {
			t.Errorf("still silent: events %v", d.Events)
		}
		f.Result = alert.Silence(t0.Add(9*time.Hour), t0.Add(9*time.Hour), 6*time.Hour)
		if d, _ := tr.Observe(t0.Add(9*time.Hour), f); len(d.Events) != 1 || d.Events[0].Type != alert.Cleared {
			t.Errorf("reading again: events %v, want cleared", d.Events)
		}
	})

	t.Run("step per window, ticket when listed", func(t *testing.T) {
		rr := r
		rr.TicketKinds = []alert.Kind{alert.Step}
		rr.AsLeft, rr.HasAsLeft = 100, true
		tr := mustTracker(t, "qm.x", rr)
		sol := lineSol(month, t0, 0, 0.01)
		f := alert.Finding{Kind: alert.Step, Window: month, Fit: &sol.Line, Coverage: 1,
			Result: alert.Result{Active: true, Since: t0.Add(-3 * time.Hour), Value: 2.5, Limit: 4, N: 3}}
		d, err := tr.Observe(t0, f)
		if err != nil {
			t.Fatal(err)
		}
		if len(d.Events) != 1 || d.Events[0].Window != "30d/1d" || d.Events[0].Unit != "kPa" || d.Events[0].Value != 2.5 {
			t.Fatalf("step events %+v", d.Events)
		}
		if d.Opened == nil || d.Opened.Reason != alert.Step {
			t.Errorf("step listed in TicketKinds: ticket %+v, want one for step", d.Opened)
		}
		// The state round-trips with the new kinds.
		b, err := tr.MarshalBinary()
		if err != nil {
			t.Fatal(err)
		}
		back := mustTracker(t, "qm.x", rr)
		if err := back.UnmarshalBinary(b); err != nil {
			t.Fatal(err)
		}
		if got := back.Alerts(); len(got) != 1 || got[0].Kind != alert.Step || got[0].State != alert.Firing {
			t.Errorf("decoded alerts %+v", got)
		}
	})

	t.Run("no ticket unless listed", func(t *testing.T) {
		tr := mustTracker(t, "qm.x", r)
		sol := lineSol(month, t0, 0, 0.01)
		d, err := tr.Observe(t0, alert.Finding{Kind: alert.OutOfSpan, Fit: &sol.Line, Result: alert.SpanCheck(t0, 300, 0, 250)})
		if err != nil || len(d.Events) != 1 || d.Opened != nil {
			t.Errorf("out of span: %+v, %v; want one event and no ticket", d, err)
		}
	})

	bad := []struct {
		name string
		f    alert.Finding
		text string
	}{
		{"fit kind", alert.Finding{Kind: alert.Slope}, "not a detector kind"},
		{"kind off", alert.Finding{Kind: alert.Spike}, "not set in the rule"},
		{"step without window", alert.Finding{Kind: alert.Step}, "not in the rule"},
		{"silent with window", alert.Finding{Kind: alert.Silent, Window: month}, "kept per sensor"},
		{"NaN value", alert.Finding{Kind: alert.Silent, Result: alert.Result{Value: math.NaN()}}, "value NaN"},
	}
	for _, tc := range bad {
		t.Run(tc.name, func(t *testing.T) {
			tr := mustTracker(t, "qm.x", r)
			_, err := tr.Observe(t0, tc.f)
			if !errors.Is(err, alert.ErrBadFinding) || !strings.Contains(err.Error(), tc.text) {
				t.Errorf("Observe(%s) error = %v, want ErrBadFinding containing %q", tc.name, err, tc.text)
			}
		})
	}
}

// TestKinds_Table: every kind has a name that round-trips, a report
// unit, and exactly the documented ticket default.
func TestKinds_Table(t *testing.T) {
	for _, k := range alert.Kinds() {
		b, err := k.MarshalText()
		if err != nil {
			t.Fatalf("%d: %v", k, err)
		}
		back, err := alert.ParseKind(string(b))
		if err != nil || back != k {
			t.Errorf("ParseKind(%q) = %v, %v; want %v", b, back, err, k)
		}
		if alert.ReportUnit(k, "kPa") == "" {
			t.Errorf("kind %v has no report unit", k)
		}
		if k.FitKind() && !k.PerWindow() {
			t.Errorf("fit kind %v kept per sensor", k)
		}
	}
	if got := len(alert.Kinds()); got != 9 {
		t.Errorf("%d kinds, want 9", got)
	}
	if _, err := alert.ParseKind("drift"); err == nil {
		t.Errorf("ParseKind(drift) succeeded")
	}
}
