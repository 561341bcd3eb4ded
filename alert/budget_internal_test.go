package alert

import (
	"math"
	"testing"
	"time"

	"driftfit/rolling"
)

// TestGateMultiple_ClosedForms checks the quantiles the gates take from
// the budget against distributions with closed forms (Johnson, Kotz &
// Balakrishnan, Continuous Univariate Distributions, vol. 2, ch. 27–28):
//   - Student's t with 2 degrees of freedom has CDF ½ + t/(2√(2 + t²)),
//     so its (1 − a) quantile is (1 − 2a)·√(2/(1 − (1 − 2a)²));
//   - F(2, d) has survival (1 + 2f/d)^(−d/2), so its (1 − p) quantile
//     is (d/2)·(p^(−2/d) − 1), and Scheffé's multiple for a line is
//     √(2f).
func TestGateMultiple_ClosedForms(t *testing.T) {
	t2 := func(a float64) float64 { u := 1 - 2*a; return u * math.Sqrt(2/(1-u*u)) }
	for _, p := range []float64{0.05, 1e-3, 1e-5, 4.3e-7} {
		if got, want := gateMultiple(p, 2, 2, 0), t2(p/2); math.Abs(got-want) > 1e-6*want {
			t.Errorf("gateMultiple(p %g, two-sided, df 2) = %v, want %v", p, got, want)
		}
		if got, want := gateMultiple(p, 1, 2, 0), t2(p); math.Abs(got-want) > 1e-6*want {
			t.Errorf("gateMultiple(p %g, one-sided, df 2) = %v, want %v", p, got, want)
		}
		for _, d := range []int{5, 22, 28} {
			f := float64(d) / 2 * (math.Pow(p, -2/float64(d)) - 1)
			if got, want := schefféMultiple(p, 2, d, 0), math.Sqrt(2*f); math.Abs(got-want) > 1e-6*want {
				t.Errorf("schefféMultiple(p %g, 2 coefficients, df %d) = %v, want %v", p, d, got, want)
			}
		}
	}
	// Never below the fit's own t.
	if got := gateMultiple(0.5, 2, 22, 2.07); got != 2.07 {
		t.Errorf("gateMultiple(p 0.5) = %v, want the floor 2.07", got)
	}
	if got := gateMultiple(1e-3, 2, 0, 2); !math.IsInf(got, 1) {
		t.Errorf("gateMultiple(df 0) = %v, want +Inf (never breach)", got)
	}
}

// TestBudget_Alpha: α = B/(E·K·W) written out. Windows 1d/1h and 30d/1d
// are judged E = 365.2425·24 = 8765.82 and 365.2425 times a year. With
// four limit kinds, slope and lead time opening tickets:
//   - one budget of 0.01 for both: every kind α = 0.01/(E·4·2);
//   - tickets 0.01, alerts 1: ticket kinds min(1/(E·4·2), 0.01/(E·2·2))
//     = 0.01/(4E), the others 1/(8E).
func TestBudget_Alpha(t *testing.T) {
	base := DefaultRule()
	base.Tolerance = 3
	base.Limits = Limits{Slope: RateLimit{0.05, 0.1}, Curvature: RateLimit{0.01, 0.02},
		Doubling: DurationLimit{90 * day, 30 * day}, LeadTime: DurationLimit{30 * day, 7 * day}}
	e := [2]float64{365.2425 * 24, 365.2425}
	tests := []struct {
		name   string
		budget Budget
		want   func(w int, k Kind) float64
	}{
		{"default", Budget{}, func(w int, k Kind) float64 { return 0.01 / (e[w] * 8) }},
		{"tickets 0.01, alerts 1", Budget{FalseTicketsPerYear: 0.01, AlertsPerYear: 1}, func(w int, k Kind) float64 {
			if k == Slope || k == LeadTime {
				return 0.01 / (4 * e[w])
			}
			return 1 / (8 * e[w])
		}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			r := base
			r.Budget = tc.budget
			tr, err := NewTracker("x", r)
			if err != nil {
				t.Fatal(err)
			}
			for w := range 2 {
				for _, k := range []Kind{Slope, Curvature, Doubling, LeadTime} {
					got, ok := tr.Alpha(w, k)
					if want := tc.want(w, k); !ok || math.Abs(got-want) > 1e-12*want {
						t.Errorf("Alpha(%d, %v) = %v, %v; want %v", w, k, got, ok, want)
					}
				}
				if _, ok := tr.Alpha(w, Step); ok {
					t.Errorf("Alpha(%d, step) granted; detector kinds are not gated on fits", w)
				}
			}
		})
	}
	if got := EvaluationsPerYear(time.Hour); math.Abs(got-8765.82) > 1e-9 {
		t.Errorf("EvaluationsPerYear(1h) = %v, want 8765.82", got)
	}
}

// TestSEFor_RefusedMeansNotJudged: a fit whose standard error seFor
// refuses (here NaN, as a correction that cannot be estimated would be)
// leaves the window not judged, for the reason SerialUnknown.
func TestSEFor_RefusedMeansNotJudged(t *testing.T) {
	r := DefaultRule()
	r.Tolerance, r.MinReadings = 3, 4
	r.Limits.Slope.Warning = 0.05
	rr, err := r.resolve()
	if err != nil {
		t.Fatal(err)
	}
	f := rolling.Fit{Model: rolling.Line, N: 30, DF: 28, TCrit: 2.048, PosDef: true, Cond: 3, ResidSD: 1,
		Coef: [3]float64{100, 1}, SE: [3]float64{0.1, 0.1}}
	for i := range 2 {
		f.CI[i] = [2]float64{f.Coef[i] - 0.2, f.Coef[i] + 0.2}
	}
	sol := rolling.Solution{Window: rr.Windows[1], Panes: 30, Filled: 30, N: 30, Line: f}
	if j := rr.judgement(&sol, &sol.Line); j.Reason != Judged {
		t.Fatalf("judgement = %v, want judged", j)
	}
	// A NaN SE fails usable (IllConditioned) before seFor is asked, so
	// seFor's refusal is checked on its own.
	if _, ok := seFor(&rolling.Fit{SE: [3]float64{0, math.NaN()}}, 1); ok {
		t.Errorf("seFor(NaN SE) ok, want refused")
	}
	if _, ok := covScale(&rolling.Fit{SE: [3]float64{math.Inf(1), 0}}); ok {
		t.Errorf("covScale(infinite SE) ok, want refused")
	}
}

// TestTracker_StepSettings: H from the budget meets the run length the
// budget asks for, and no smaller H does: a rule of slope and step on
// the default windows gives K = 2 shares, α = 0.01/(E·2·2).
func TestTracker_StepSettings(t *testing.T) {
	r := DefaultRule()
	r.Tolerance, r.Limits.Slope.Warning, r.Detect.Step.On = 3, 0.1, true
	tr, err := NewTracker("x", r)
	if err != nil {
		t.Fatal(err)
	}
	for w, e := range []float64{365.2425 * 24, 365.2425} {
		s, ok := tr.StepSettings(w)
		if !ok {
			t.Fatalf("StepSettings(%d) not ok", w)
		}
		arl0 := 1 / (0.01 / (e * 4))
		if got := CUSUMARL(s.K, s.H, 0, 100); got < arl0 {
			t.Errorf("window %d: H %v gives ARL0 %v < %v", w, s.H, got, arl0)
		}
		if got := CUSUMARL(s.K, s.H-0.002, 0, 100); got >= arl0 {
			t.Errorf("window %d: H %v − 0.002 still gives ARL0 %v >= %v: not the smallest", w, s.H, got, arl0)
		}
		if a, _ := tr.Alpha(w, Slope); math.Abs(a-0.01/(e*4)) > 1e-15 {
			t.Errorf("window %d: slope α %v, want the step's share counted, %v", w, a, 0.01/(e*4))
		}
	}
	if _, ok := tr.StepSettings(2); ok {
		t.Errorf("StepSettings(2) ok for a rule of two windows")
	}
}

// TestRateEvidence_GateFromBudget: on one 30-day window with only a
// slope limit and debounce 1, the budget grants α = B/365.2425 per
// evaluation and the floor is the (1 − α/2) quantile of t with 28
// degrees of freedom. An estimate 0.1 standard errors inside the floor
// does not breach; 0.1 outside does, although both intervals lie beyond
// the limit. A budget of 100 a year asks for less than the 95% interval
// already needs, and the floor stays at the fit's t.
func TestRateEvidence_GateFromBudget(t *testing.T) {
	for _, b := range []float64{0.01, 1, 100} {
		r := DefaultRule()
		r.Tolerance, r.Debounce = 3, 1
		r.Windows = r.Windows[1:]
		r.Limits.Slope.Warning = 1e-4 // far inside: the floor decides
		r.Budget.FalseTicketsPerYear = b
		tr, err := NewTracker("x", r)
		if err != nil {
			t.Fatal(err)
		}
		a, _ := tr.Alpha(0, Slope)
		if want := b / 365.2425; math.Abs(a-want) > 1e-15*want {
			t.Fatalf("budget %v: α %v, want %v", b, a, want)
		}
		q := gateMultiple(a, 2, 28, 2.048)
		for _, c := range []struct {
			ratio float64
			want  bool
		}{{q - 0.1, false}, {q + 0.1, true}} {
			const se = 0.01
			f := rolling.Fit{Model: rolling.Line, N: 30, DF: 28, TCrit: 2.048, PosDef: true, Cond: 3, ResidSD: 1,
				Coef: [3]float64{100, c.ratio * se}, SE: [3]float64{0.1, se}}
			ev := rateEvidence(&f, 1, r.Limits.Slope, 0.8, 2, a)
			if got := ev.sev != SeverityUnknown; got != c.want {
				t.Errorf("budget %v (q %.3f): c/SE %.3f breached %v, want %v", b, q, c.ratio, got, c.want)
			}
		}
	}
}
