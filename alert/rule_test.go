package alert_test

import (
	"errors"
	"math"
	"strings"
	"testing"
	"time"

	"gonum.org/v1/gonum/stat/distuv"

	"driftfit/alert"
	"driftfit/rolling"
)

func TestNewTracker_RejectsBadRules(t *testing.T) {
	good := func() alert.Rule {
		r := alert.DefaultRule()
		r.Tolerance = 0.5
		r.Limits.Slope.Critical = 0.1
		return r
	}
	tests := []struct {
		name   string
		edit   func(*alert.Rule)
		substr string
	}{
		{"no tolerance", func(r *alert.Rule) { r.Tolerance = 0 }, "Tolerance = 0: must be finite and > 0"},
		{"NaN tolerance", func(r *alert.Rule) { r.Tolerance = math.NaN() }, "Tolerance = NaN"},
		{"span reversed", func(r *alert.Rule) { r.SpanLower, r.SpanUpper = 10, 0 }, "SpanLower/SpanUpper = [10 0]"},
		{"no windows", func(r *alert.Rule) { r.Windows = nil }, "Windows = []: at least one window"},
		{"pane not dividing span", func(r *alert.Rule) {
			r.Windows = []rolling.WindowSpec{{Span: 25 * time.Hour, Pane: 2 * time.Hour}}
		}, "Windows[0] = {25h0m0s 2h0m0s}"},
		{"window twice", func(r *alert.Rule) { r.Windows = append(r.Windows, r.Windows[0]) }, "repeats Windows[0]"},
		{"exp as trend", func(r *alert.Rule) { r.TrendModel = rolling.Exp }, "TrendModel = exp"},
		{"three readings", func(r *alert.Rule) { r.MinReadings = 3 }, "MinReadings = 3: must be >= 4"},
		{"coverage above one", func(r *alert.Rule) { r.MinCoverage = 1.5 }, "MinCoverage = 1.5"},
		{"clear fraction one", func(r *alert.Rule) { r.ClearFraction = 1 }, "ClearFraction = 1: must be in (0, 1)"},
		{"negative debounce", func(r *alert.Rule) { r.Debounce = -1 }, "Debounce = -1"},
		{"negative cooldown", func(r *alert.Rule) { r.Cooldown = -time.Hour }, "Cooldown = -1h0m0s"},
		{"negative margin", func(r *alert.Rule) { r.TicketMargin = -time.Hour }, "TicketMargin = -1h0m0s"},
		{"slope levels swapped", func(r *alert.Rule) { r.Limits.Slope = alert.RateLimit{Warning: 0.2, Critical: 0.1} }, "Limits.Slope = {0.2 0.1}: warning must be below critical"},
		{"negative curvature", func(r *alert.Rule) { r.Limits.Curvature.Warning = -1 }, "Limits.Curvature.Warning = -1"},
		{"lead levels swapped", func(r *alert.Rule) {
			r.Limits.LeadTime = alert.DurationLimit{Warning: day, Critical: 2 * day}
		}, "warning must be longer than critical"},
		{"horizon too short to clear", func(r *alert.Rule) {
			r.Limits.LeadTime.Warning, r.Horizon = 30*day, 30*day
		}, "Horizon = 720h0m0s: must reach"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			r := good()
			tc.edit(&r)
			_, err := alert.NewTracker("qm.x", r)
			if !errors.Is(err, alert.ErrBadRule) || !strings.Contains(err.Error(), tc.substr) {
				t.Errorf("NewTracker error = %v, want ErrBadRule containing %q", err, tc.substr)
			}
			var re *alert.RuleError
			if !errors.As(err, &re) {
				t.Errorf("NewTracker error %v holds no *RuleError", err)
			}
		})
	}
	// Every problem is reported at once.
	r := good()
	r.Tolerance, r.MinReadings = -1, 2
	_, err := alert.NewTracker("qm.x", r)
	if err == nil || !strings.Contains(err.Error(), "Tolerance") || !strings.Contains(err.Error(), "MinReadings") {
		t.Errorf("NewTracker(two problems) error = %v, want both named", err)
	}
}

func TestNewTracker_Defaults(t *testing.T) {
	tr := mustTracker(t, "qm.x", alert.Rule{Tolerance: 1, Windows: []rolling.WindowSpec{month},
		Limits: alert.Limits{LeadTime: alert.DurationLimit{Warning: 30 * day}}})
	r := tr.Rule()
	if r.TrendModel != rolling.Line || r.MinReadings != 30 || r.MaxCond != 1e4 || r.Debounce != 3 ||
		r.ClearFraction != 0.8 || r.TicketMargin != 7*day || r.Horizon != 120*day ||
		r.MinCoverage != 0 || r.Cooldown != 0 {
		t.Errorf("defaults = %+v", r)
	}
}

// TestTracker_Evaluate_Gates: a fit that fails a gate gives no evidence,
// however strong its drift.
func TestTracker_Evaluate_Gates(t *testing.T) {
	tests := []struct {
		name string
		edit func(*rolling.Solution)
	}{
		{"too few readings", func(s *rolling.Solution) { s.N, s.Line.N = 29, 29 }},
		{"low coverage", func(s *rolling.Solution) { s.Filled = s.Panes/2 - 1 }},
		{"ill-conditioned", func(s *rolling.Solution) { s.Line.Cond = 2e4 }},
		{"not positive definite", func(s *rolling.Solution) { s.Line.PosDef = false }},
		{"fit error", func(s *rolling.Solution) { s.Line.Err = rolling.ErrNotEnoughData }},
		{"NaN", func(s *rolling.Solution) { s.Line.SE[1] = math.NaN() }},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			r := alert.DefaultRule()
			r.Tolerance, r.Debounce = 1, 1
			r.Limits.Slope.Critical = 0.1
			tr := mustTracker(t, "qm.x", r)
			sol := lineSol(month, t0, 10, se)
			tc.edit(&sol)
			d, err := tr.Evaluate(t0, &sol)
			if err != nil || len(d.Events) != 0 {
				t.Errorf("Evaluate = %+v, %v; want no event", d.Events, err)
			}
			sol = lineSol(month, t0, 10, se) // the same fit, ungated, raises
			if d, _ := tr.Evaluate(t0, &sol); len(d.Events) != 1 {
				t.Errorf("ungated Evaluate events %+v, want one", d.Events)
			}
		})
	}
}

// TestTracker_Evaluate_CurvatureAndDoubling checks the two kinds that
// sit on the parabola and exp fits against hand-made intervals.
func TestTracker_Evaluate_CurvatureAndDoubling(t *testing.T) {
	fit := func(m rolling.Model, i int, c, se float64) rolling.Fit {
		f := rolling.Fit{Model: m, N: 30, DF: 30 - m.Coefs(), TCrit: tcrit28, Cond: 10, PosDef: true, ResidSD: 0.01}
		f.Coef[0], f.Coef[i], f.SE[i] = 4.6, c, se
		for j := range m.Coefs() {
			f.CI[j] = [2]float64{f.Coef[j] - f.TCrit*f.SE[j], f.Coef[j] + f.TCrit*f.SE[j]}
		}
		return f
	}
	r := alert.DefaultRule()
	r.Tolerance, r.Debounce = 1, 1
	r.Windows = []rolling.WindowSpec{month}
	r.Limits.Curvature.Warning = 0.01
	r.Limits.Doubling.Warning = 90 * day // growth rate ln 2/90 = 0.0077016 /d
	tests := []struct {
		name      string
		curv, gro float64 // coefficients; SE 0.001 for both (half-width 0.0020484)
		want      []alert.Kind
	}{
		{"neither", 0.005, 0.005, nil},
		{"curvature up: 0.0125 − 0.0020 > 0.01", 0.0125, 0, []alert.Kind{alert.Curvature}},
		{"curvature down: −0.0125 + 0.0020 < −0.01", -0.0125, 0, []alert.Kind{alert.Curvature}},
		{"growth: 0.0100 − 0.0020 > 0.0077", 0, 0.01, []alert.Kind{alert.Doubling}},
		{"decay is not growth", 0, -0.05, nil},
		{"growth at the limit is not enough: 0.0090 − 0.0020 < 0.0077", 0, 0.009, nil},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			tr := mustTracker(t, "qm.x", r)
			sol := lineSol(month, t0, 0, se)
			sol.Parabola = fit(rolling.Parabola, 2, tc.curv, 0.001)
			sol.Exp = fit(rolling.Exp, 1, tc.gro, 0.001)
			d, err := tr.Evaluate(t0, &sol)
			if err != nil {
				t.Fatal(err)
			}
			var got []alert.Kind
			for _, e := range d.Events {
				got = append(got, e.Kind)
			}
			if len(got) != len(tc.want) || (len(got) > 0 && got[0] != tc.want[0]) {
				t.Errorf("events of kinds %v, want %v", got, tc.want)
			}
			if len(d.Events) > 0 && d.Events[0].Kind == alert.Doubling && d.Events[0].Limit != math.Ln2/90 {
				t.Errorf("doubling limit %v, want ln 2/90", d.Events[0].Limit)
			}
		})
	}
}

// TestTCrit28 checks the t quantile used by the synthetic fits against
// gonum's Student's t, an independent implementation.
func TestTCrit28(t *testing.T) {
	if got := (distuv.StudentsT{Mu: 0, Sigma: 1, Nu: 28}).Quantile(0.975); math.Abs(got-tcrit28) > 1e-12 {
		t.Errorf("t(0.975, 28) = %v, test constant %v", got, tcrit28)
	}
}
