package rolling_test

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"driftfit/rolling"
)

// iso28037Ex5 feeds ISO/TS 28037:2010 Example 5 (x = 1…6, here in days
// after t0, and y below) into a 10-day window of 1-day panes.
func iso28037Ex5(t *testing.T) (*rolling.Fit, time.Time) {
	t.Helper()
	t0 := time.Date(2026, 7, 1, 0, 0, 0, 0, time.UTC)
	ys := []float64{3.014, 5.225, 7.004, 9.061, 11.201, 12.762}
	s := newSensor(t, rolling.WindowSpec{Span: 10 * 24 * time.Hour, Pane: 24 * time.Hour})
	for i, y := range ys {
		if err := s.Add(rolling.Reading{UnixNano: t0.Add(time.Duration(i+1) * 24 * time.Hour).UnixNano(), Value: y}); err != nil {
			t.Fatal(err)
		}
	}
	f := s.Solve(0).Line
	return &f, t0
}

// TestFit_ISO28037Example5 checks the line of ISO/TS 28037:2010 Example
// 5 against its published results (values as we hold them, from memory
// of the standard's tables): a = 1.172, u(a) = 0.158875093196181,
// b = 1.96357142857143, u(b) = 0.0407953578791729,
// cov(a, b) = −0.00582491428571429.
//
// These are the unweighted least-squares estimates with the variance of
// y estimated from the residuals, s² = RSS/(n − 2) = 6371/218750 =
// 0.029124571… (RSS = 12742/109375 exactly): u(b) = s/√Sxx with
// Sxx = 35/2 gives 0.0407953578791729, while a known standard
// uncertainty u(y) = 0.2, say, would give 0.0478. So the example is the
// ordinary least-squares case, which Fit is.
func TestFit_ISO28037Example5(t *testing.T) {
	f, t0 := iso28037Ex5(t)
	coef, se := f.Rebase(t0, 24*time.Hour)
	// cov(a, b) with a = c0 − 6·c1 (τ = x − 6), b = c1.
	cov := f.Cov[0][1] - 6*f.Cov[1][1]
	for _, c := range []struct {
		what      string
		got, want float64
	}{
		{"a", coef[0], 1.172},
		{"u(a)", se[0], 0.158875093196181},
		{"b", coef[1], 1.96357142857143},
		{"u(b)", se[1], 0.0407953578791729},
		{"cov(a,b)", cov, -0.00582491428571429},
	} {
		// The published values have 15 significant digits.
		if math.Abs(c.got-c.want) > 1e-13*math.Abs(c.want) {
			t.Errorf("%s = %.16g, want %.15g", c.what, c.got, c.want)
		}
	}
}

// TestFit_MeanTimeToLimit_Fieller checks Fieller's interval and the
// one-sided lower bound on the data of ISO/TS 28037 Example 5 for the
// level L = 20, against the quadratic solved in the test from the exact
// least-squares results (TestFit_ISO28037Example5):
//
//	a = 293/250, b = 2749/1400, Var a = 82823/3281250,
//	Var b = 6371/3828125, Cov(a, b) = −6371/1093750, 4 degrees of freedom,
//	t(0.975, 4) and t(0.95, 4) from the closed form for ν = 4
//	(student_test.go);
//
//	A = b² − t²·Var b, B = b(a − L) − t²·Cov(a, b), C = (a − L)² − t²·Var a,
//	x = (−B ∓ √(B² − A·C))/A,
//
// giving x* = (L − a)/b = 9.5886504…, the two-sided interval
// [9.2430336, 9.9749214] and the one-sided lower bound 9.3200048, in
// days after t0: τ = x − 6 from the newest reading.
func TestFit_MeanTimeToLimit_Fieller(t *testing.T) {
	f, _ := iso28037Ex5(t)
	const L = 20.0
	a, b := 293.0/250, 2749.0/1400
	vaa, vbb, vab := 82823.0/3281250, 6371.0/3828125, -6371.0/1093750
	t4 := func(p float64) float64 {
		al := 4 * p * (1 - p)
		q := math.Cos(math.Acos(math.Sqrt(al))/3) / math.Sqrt(al)
		return 2 * math.Sqrt(q-1)
	}
	roots := func(tq float64) (float64, float64) {
		A := b*b - tq*tq*vbb
		B := b*(a-L) - tq*tq*vab
		C := (a-L)*(a-L) - tq*tq*vaa
		d := math.Sqrt(B*B - A*C)
		return (-B - d) / A, (-B + d) / A
	}
	lo, hi := roots(t4(0.975))
	lower, _ := roots(t4(0.95))
	mc, err := f.MeanTimeToLimit(L, true, false, 365*24*time.Hour)
	if err != nil {
		t.Fatal(err)
	}
	if !mc.Significant || !mc.IntervalOK || !mc.LowerOK || mc.Kind != rolling.CrossAhead {
		t.Fatalf("MeanTimeToLimit = %+v, want a significant rate, an interval and a bound", mc)
	}
	for _, c := range []struct {
		what      string
		got, want float64
	}{
		{"τ*", mc.Days, (L-a)/b - 6},
		{"Fieller low", mc.LowDays, lo - 6},
		{"Fieller high", mc.HighDays, hi - 6},
		{"one-sided lower bound", mc.LowerDays, lower - 6},
	} {
		if math.Abs(c.got-c.want) > 1e-11*math.Abs(c.want) {
			t.Errorf("%s = %.15g days, want %.15g", c.what, c.got, c.want)
		}
	}
	t.Logf("x* %.10g, interval [%.10g, %.10g], lower bound %.10g (x in days)", mc.Days+6, mc.LowDays+6, mc.HighDays+6, mc.LowerDays+6)
	// Falling to a lower limit, mirrored: y' = −y against −L.
	if _, err := f.MeanTimeToLimit(-L, false, false, time.Hour); err != nil {
		t.Fatal(err)
	}
	if m, _ := f.MeanTimeToLimit(1, false, false, 365*24*time.Hour); m.Kind != rolling.CrossNever || m.LowerOK {
		t.Errorf("rising trend against a lower limit below it: %+v, want never and no bound", m)
	}
	if m, _ := f.MeanTimeToLimit(10, true, false, 365*24*time.Hour); m.Kind != rolling.CrossPast || !m.LowerOK || m.LowerDays != 0 {
		t.Errorf("limit already passed: %+v, want past and a bound of 0", m)
	}
}

// TestFit_MeanTimeToLimit_Band checks the parabola's inverted confidence
// band: at LowerDays the near edge c(τ) + t(0.95)·√(xᵀCov·x) equals the
// limit, and before it stays below; for a line the same checks hold of
// the root of Fieller's closed form.
func TestFit_MeanTimeToLimit_Band(t *testing.T) {
	seed := uint64(11)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	s := newSensor(t, rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour})
	for i := range 30 * 24 {
		tau := float64(i) / 24
		if err := s.Add(rolling.Reading{UnixNano: t2026 + int64(i)*int64(time.Hour), Value: 5 + 0.02*tau + 0.001*tau*tau + 0.05*rng.NormFloat64()}); err != nil {
			t.Fatal(err)
		}
	}
	sol := s.Solve(0)
	const L = 8.0
	for _, m := range []rolling.Model{rolling.Parabola, rolling.Line} {
		f := sol.Fit(m)
		for _, corrected := range []bool{false, true} {
			t.Run(fmt.Sprintf("%v/corrected=%v", m, corrected), func(t *testing.T) {
				mc, err := f.MeanTimeToLimit(L, true, corrected, 365*24*time.Hour)
				if err != nil {
					t.Fatal(err)
				}
				if !mc.LowerOK || !(mc.LowerDays > 0) || !(mc.LowerDays < mc.Days) {
					t.Fatalf("%+v: want a lower bound before the mean's crossing", mc)
				}
				cov, df := f.Cov, f.DF
				if corrected {
					for r := range 3 {
						for c := range 3 {
							cov[r][c] *= f.Inflation * f.Inflation
						}
					}
					df = int(f.NEff) - m.Coefs()
				}
				tq := rolling.StudentQuantile(0.95, float64(df))
				edge := func(tau float64) float64 {
					x := [3]float64{1, tau, tau * tau}
					var v, q float64
					for a := range m.Coefs() {
						v += f.Coef[a] * x[a]
						for b := range m.Coefs() {
							q += x[a] * cov[a][b] * x[b]
						}
					}
					return v + tq*math.Sqrt(q)
				}
				if e := edge(mc.LowerDays); math.Abs(e-L) > 1e-9*L {
					t.Errorf("band edge at the bound %.6g d = %.12g, want %g", mc.LowerDays, e, L)
				}
				for i := range 100 {
					if tau := mc.LowerDays * float64(i) / 100; edge(tau) >= L {
						t.Errorf("band edge reaches %g already at %.6g d, before the bound %.6g d", L, tau, mc.LowerDays)
						break
					}
				}
			})
		}
	}
	// Without a serial estimate, the corrected variant refuses.
	short := newSensor(t, rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour})
	for i := range 24 {
		_ = short.Add(rolling.Reading{UnixNano: t2026 + int64(i)*int64(time.Hour), Value: float64(i) + rng.NormFloat64()})
	}
	f := short.Solve(0).Line
	if _, err := f.MeanTimeToLimit(100, true, true, time.Hour); !errors.Is(err, rolling.ErrSerialUnknown) {
		t.Errorf("corrected bound with 23 pairs: err %v, want ErrSerialUnknown", err)
	}
}

// A transmitter drifting 0.05 kPa a day, with AR(1) noise: the due date
// for its mean reaching 102.5 kPa (by hand: 100 + 0.05·29.96 = 101.498
// now, so (102.5 − 101.498)/0.05 ≈ 20 days), and the earliest it could be at 95%
// confidence, with the serially corrected covariance. Readings are
// hourly for 30 days; the noise is a fixed pseudo-random sequence.
func ExampleFit_MeanTimeToLimit() {
	s, err := rolling.NewSensor(rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour})
	if err != nil {
		panic(err)
	}
	start := time.Date(2026, 4, 1, 0, 0, 0, 0, time.UTC)
	rng := rand.New(rand.NewPCG(1, 2))
	x := 0.0
	for i := range 30 * 24 {
		at := start.Add(time.Duration(i) * time.Hour)
		x = 0.8*x + 0.02*rng.NormFloat64()
		if err := s.Add(rolling.Reading{UnixNano: at.UnixNano(), Value: 100 + 0.05*at.Sub(start).Hours()/24 + x}); err != nil {
			panic(err)
		}
	}
	f := s.Solve(0).Line
	mc, err := f.MeanTimeToLimit(102.5, true, true, 365*24*time.Hour)
	if err != nil {
		panic(err)
	}
	fmt.Printf("r1 %.1f, SE inflated %.1f×\n", f.R1, f.Inflation)
	fmt.Printf("mean reaches 102.5 kPa in %.1f days, not before %.1f days (95%%)\n", mc.Days, mc.LowerDays)
	// Output:
	// r1 0.8, SE inflated 2.8×
	// mean reaches 102.5 kPa in 20.1 days, not before 19.6 days (95%)
}
