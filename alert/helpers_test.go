package alert_test

import (
	"flag"
	"math/rand/v2"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

var update = flag.Bool("update", false, "rewrite golden files in testdata")

var (
	t0      = time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC)
	month   = rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour}
	oneDay  = rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour}
	tcrit28 = 2.048407141795244 // 97.5% quantile of Student's t, 28 df: R qt(0.975, 28), from memory; checked against gonum in TestTCrit28
)

// lineSol returns a solution of window w whose line fit has drift c1 per
// day with standard error se1 and 30 readings, the newest at last. Only
// the fields the alert package reads are filled; CI = c ± t·SE as
// rolling computes it.
func lineSol(w rolling.WindowSpec, last time.Time, c1, se1 float64) rolling.Solution {
	f := rolling.Fit{
		Model: rolling.Line, N: 30, First: last.Add(-w.Span + w.Pane), Last: last,
		Coef: [3]float64{100, c1}, SE: [3]float64{0.01, se1},
		ResidSD: 0.05, R2: 0.9, DF: 28, TCrit: tcrit28, Cond: 3, PosDef: true,
	}
	f.Cov[0][0], f.Cov[1][1] = f.SE[0]*f.SE[0], se1*se1
	for i := range 2 {
		f.CI[i] = [2]float64{f.Coef[i] - f.TCrit*f.SE[i], f.Coef[i] + f.TCrit*f.SE[i]}
	}
	return rolling.Solution{
		Window: w, Panes: w.Panes(), Filled: w.Panes(), N: 30, First: f.First, Last: last,
		Line:     f,
		Parabola: rolling.Fit{Model: rolling.Parabola, Err: rolling.ErrSingular},
		Exp:      rolling.Fit{Model: rolling.Exp, Err: rolling.ErrSingular},
	}
}

// feed describes readings level + drift(days) + N(0, sigma²) every step
// from start over dur. run feeds them into a new rolling sensor and calls
// eval with a window's solution at each of its pane closes (before the
// closing reading is added), with the time of that reading.
type feed struct {
	start time.Time
	step  time.Duration
	dur   time.Duration
	level float64
	sigma float64
	drift func(days float64) float64 // added to level; nil: none
}

func (fd feed) run(t testing.TB, rng *rand.Rand, specs []rolling.WindowSpec, eval func(now time.Time, sol *rolling.Solution)) {
	t.Helper()
	s, err := rolling.NewSensor(specs...)
	if err != nil {
		t.Fatal(err)
	}
	for at := fd.start; at.Before(fd.start.Add(fd.dur)); at = at.Add(fd.step) {
		ns := at.UnixNano()
		if mask := s.Closes(ns); mask != 0 {
			for i := range specs {
				if mask&(1<<uint(i)) != 0 {
					sol := s.SolveJudged(i)
					eval(at, &sol)
				}
			}
		}
		v := fd.level + fd.sigma*rng.NormFloat64()
		if fd.drift != nil {
			v += fd.drift(at.Sub(fd.start).Hours() / 24)
		}
		if err := s.Add(rolling.Reading{UnixNano: ns, Value: v}); err != nil {
			t.Fatal(err)
		}
	}
}

func mustTracker(t testing.TB, sensor string, r alert.Rule) *alert.Tracker {
	t.Helper()
	tr, err := alert.NewTracker(sensor, r)
	if err != nil {
		t.Fatal(err)
	}
	return tr
}
