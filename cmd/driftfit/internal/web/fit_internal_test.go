package web

import (
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

// TestBand_SerialCorrection: the band drawn around a fit is the gates'.
// At τ = 0 its half-width is that of rolling's own 95% interval of c0,
// CIAdj (TCritAdj·SEAdj) when the fit carries a serial correction and CI
// (TCrit·SE) when it does not; a short window whose readings cannot
// estimate their correlation is drawn with the estimate of the sensor's
// longest window, as rolling.Sensor.SolveJudged gives the gates.
func TestBand_SerialCorrection(t *testing.T) {
	s, err := rolling.NewSensor(rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour},
		rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour})
	if err != nil {
		t.Fatal(err)
	}
	// AR(1) noise, φ = 0.5, hourly, 40 days: our simulation's recipe.
	rng := rand.New(rand.NewPCG(20261203, 1))
	t0 := time.Date(2026, 10, 1, 0, 0, 0, 0, time.UTC)
	e := rng.NormFloat64()
	for h := range 40 * 24 {
		e = 0.5*e + math.Sqrt(1-0.25)*rng.NormFloat64()
		if err := s.Add(rolling.Reading{UnixNano: t0.Add(time.Duration(h) * time.Hour).UnixNano(), Value: 100 + e}); err != nil {
			t.Fatal(err)
		}
	}
	long, short := s.Solve(1), s.Solve(0)
	if long.Line.SerialErr != nil || short.Line.SerialErr == nil {
		t.Fatalf("want the 30-day window to estimate its correlation (%v) and the 1-day one not (%v)", long.Line.SerialErr, short.Line.SerialErr)
	}
	half := func(f *rolling.Fit) float64 { _, lo, hi := band(f, 0); return (hi - lo) / 2 }
	if got, want := half(&long.Line), (long.Line.CIAdj[0][1]-long.Line.CIAdj[0][0])/2; math.Abs(got-want) > 1e-12*want {
		t.Errorf("30-day band half-width %.9g, want CIAdj's %.9g", got, want)
	}
	if got, want := half(&short.Line), (short.Line.CI[0][1]-short.Line.CI[0][0])/2; math.Abs(got-want) > 1e-12*want {
		t.Errorf("1-day band (no correction) half-width %.9g, want CI's %.9g", got, want)
	}
	drawn := withSerial(short, alert.SerialOf(&long, &short))
	judged := s.SolveJudged(0)
	if got, want := half(&drawn.Line), (judged.Line.CIAdj[0][1]-judged.Line.CIAdj[0][0])/2; math.Abs(got-want) > 1e-12*want || drawn.Line.Inflation <= 1 {
		t.Errorf("1-day band drawn %.9g (inflation %.3g), want SolveJudged's %.9g", got, drawn.Line.Inflation, want)
	}
}
