package alert

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"driftfit/rolling"
)

// TestJudge_SameAsEvaluate runs sensors with AR(1) noise of several
// coefficients through a tracker, with a calibration (and fresh windows)
// half-way, and at every pane close compares Judge, given the serial
// estimate the tracker holds just before, with the Judgement Evaluate
// returns: they must be identical, number for number. The runs must
// reach every gate Judge can report, so that the comparison covers each.
func TestJudge_SameAsEvaluate(t *testing.T) {
	const seed = 31
	t.Logf("seed %d", seed)
	day := 24 * time.Hour
	specs := []rolling.WindowSpec{{Span: day, Pane: time.Hour}, {Span: 30 * day, Pane: day}}
	r := DefaultRule()
	r.Tolerance, r.Windows = 5, specs
	r.Limits.Slope = RateLimit{Warning: 0.2}
	seen := map[Reason]int{}
	for _, phi := range []float64{0, 0.9, 0.98} {
		rng := rand.New(rand.NewPCG(seed, math.Float64bits(phi)))
		tr, err := NewTracker("qm.u1.steam.pt-7", r)
		if err != nil {
			t.Fatal(err)
		}
		s, err := rolling.NewSensor(specs...)
		if err != nil {
			t.Fatal(err)
		}
		start := time.Date(2026, 5, 1, 0, 0, 0, 0, time.UTC)
		calAt := start.Add(45 * day)
		calibrated := false
		e := 0.0
		for at := start; at.Before(start.Add(80 * day)); at = at.Add(10 * time.Minute) {
			if !calibrated && !at.Before(calAt) {
				calibrated = true
				if _, err := tr.Calibrate(Calibration{Time: calAt, AsFound: 100, AsLeft: 100}); err != nil {
					t.Fatal(err)
				}
				if s, err = rolling.NewSensor(specs...); err != nil {
					t.Fatal(err)
				}
			}
			ns := at.UnixNano()
			if mask := s.Closes(ns); mask != 0 {
				for i := range specs {
					if mask&(1<<uint(i)) == 0 {
						continue
					}
					sol := s.Solve(i)
					if sol.Parabola.Pairs < rolling.MinPairs {
						sol = s.SolveJudged(i) // as the service's workers do
					}
					held := Serial{R1: tr.serialR1, Pairs: int(tr.serialPairs), Window: tr.serialWin}
					got, jerr := Judge(r, &sol, held)
					d, err := tr.Evaluate(at, &sol)
					if errors.Is(err, ErrStale) {
						continue
					}
					if err != nil || jerr != nil {
						t.Fatalf("φ %v at %v: Evaluate: %v, Judge: %v", phi, at, err, jerr)
					}
					if got != d.Judgement {
						t.Fatalf("φ %v at %v window %s: Judge = %#v, Evaluate = %#v", phi, at, WindowName(sol.Window), got, d.Judgement)
					}
					seen[got.Reason]++
				}
			}
			e = phi*e + math.Sqrt(1-phi*phi)*rng.NormFloat64()
			if err := s.Add(rolling.Reading{UnixNano: ns, Value: 100 + 0.3*e}); err != nil {
				t.Fatal(err)
			}
		}
	}
	t.Logf("judgements by reason: %v", seen)
	for _, want := range []Reason{Judged, TooFewReadings, SerialUnknown, FewEffective} {
		if seen[want] == 0 {
			t.Errorf("no judgement %s in the runs: %v", want, seen)
		}
	}
}

// TestJudge_Errors checks the errors Judge returns instead of a verdict.
func TestJudge_Errors(t *testing.T) {
	r := DefaultRule()
	r.Tolerance = 1
	sol := rolling.Solution{Window: rolling.WindowSpec{Span: time.Hour, Pane: time.Minute}}
	if _, err := Judge(r, &sol, Serial{}); !errors.Is(err, ErrUnknownWindow) {
		t.Errorf("Judge(window not in rule) error %v, want ErrUnknownWindow", err)
	}
	r.Tolerance = 0
	sol.Window = r.Windows[0]
	var re *RuleError
	if _, err := Judge(r, &sol, Serial{}); !errors.Is(err, ErrBadRule) || !errors.As(err, &re) || re.Field != "Tolerance" {
		t.Errorf("Judge(no tolerance) error %v, want ErrBadRule naming Tolerance", err)
	}
}
