package alert_test

import (
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

// TestEWMALimit_NISTExample: NIST/SEMATECH e-Handbook of Statistical
// Methods, §6.3.2.4 "EWMA Control Charts", example: target 50,
// s = 2.0539, λ = 0.3, k = 3 give UCL 52.5884 and LCL 47.4115 (the
// handbook's rounding, to 4 decimals). TestStepDetector_NISTEWMAExample
// checks the handbook's EWMA column.
func TestEWMALimit_NISTExample(t *testing.T) {
	const target, s, lambda, l = 50, 2.0539, 0.3, 3
	half := s * alert.EWMALimit(lambda, l)
	for _, c := range []struct {
		name      string
		got, want float64
	}{
		{"UCL", target + half, 52.5884},
		{"LCL", target - half, 47.4115},
	} {
		if math.Abs(c.got-c.want) > 1e-4 {
			t.Errorf("EWMA %s = %.5f, want %.4f (NIST §6.3.2.4)", c.name, c.got, c.want)
		}
	}
	// The exact limit tends to the asymptotic one: after t updates the
	// variance factor is 1 − (1−λ)^(2t) (Montgomery, Introduction to
	// Statistical Quality Control, §9.2.1); at t = 1 it is λ², so the
	// limit is L·λ·s: one update of weight λ.
	if got, want := alert.EWMALimitAt(lambda, l, 1), l*lambda; math.Abs(got-want) > 1e-12 {
		t.Errorf("EWMALimitAt(t=1) = %v, want L·λ = %v", got, want)
	}
	if got, want := alert.EWMALimitAt(lambda, l, 200), alert.EWMALimit(lambda, l); math.Abs(got-want) > 1e-12 {
		t.Errorf("EWMALimitAt(t=200) = %v, want the asymptotic %v", got, want)
	}
}

// TestStepDetector_EWMARecursion checks the EWMA against the recursion
// E_t = λz_t + (1−λ)E_{t−1}, E_0 = 0, worked by hand for λ = 0.3 on
// z = 1, 2, −1: E1 = 0.3, E2 = 0.6 + 0.21 = 0.81,
// E3 = −0.3 + 0.567 = 0.267.
func TestStepDetector_EWMARecursion(t *testing.T) {
	d, err := alert.NewStepDetector(alert.StepSettings{Lambda: 0.3, H: 100})
	if err != nil {
		t.Fatal(err)
	}
	for i, c := range []struct{ z, want float64 }{{1, 0.3}, {2, 0.81}, {-1, 0.267}} {
		r := d.Update(t0.Add(time.Duration(i)*time.Hour), c.z, c.z)
		if math.Abs(r.EWMA-c.want) > 1e-12 {
			t.Errorf("update %d: EWMA = %v, want %v", i+1, r.EWMA, c.want)
		}
	}
}

// TestStepDetector_MontgomeryRungerTable: the tabular CUSUM of
// Montgomery & Runger, Applied Statistics and Probability for
// Engineers, 3rd ed. (Wiley 2003), Example 16-6, Table 16-8: chemical
// process concentration, target μ0 = 99, K = 1, H = 10, upper CUSUM
// s_H(i) = max(0, x_i − 100 + s_H(i−1)), lower s_L(i) = max(0,
// 98 − x_i + s_L(i−1)). The book's table gives s_H and s_L to one
// decimal and never reaches H. Fed raw deviations x − 99 with K = 1 the
// detector computes the same sums.
func TestStepDetector_MontgomeryRungerTable(t *testing.T) {
	x := []float64{102.0, 94.8, 98.3, 98.4, 102.0, 98.5, 99.0, 97.7, 100.0, 98.1,
		101.3, 98.7, 101.1, 98.4, 97.0, 96.7, 100.3, 101.4, 97.2, 101.0}
	sH := []float64{2.0, 0, 0, 0, 2.0, 0.5, 0, 0, 0, 0, 1.3, 0, 1.1, 0, 0, 0, 0.3, 1.7, 0, 1.0}
	sL := []float64{0, 3.2, 2.9, 2.5, 0, 0, 0, 0.3, 0, 0, 0, 0, 0, 0, 1.0, 2.3, 0, 0, 0.8, 0}
	d, err := alert.NewStepDetector(alert.StepSettings{K: 1, H: 10})
	if err != nil {
		t.Fatal(err)
	}
	for i, v := range x {
		r := d.Update(t0.Add(time.Duration(i)*time.Hour), v-99, v-99)
		if math.Abs(r.Hi-sH[i]) > 0.05 || math.Abs(r.Lo-sL[i]) > 0.05 {
			t.Errorf("observation %d (x = %v): s_H %.4f s_L %.4f, want %.1f %.1f (Montgomery & Runger Table 16-8)",
				i+1, v, r.Hi, r.Lo, sH[i], sL[i])
		}
		if r.Signal {
			t.Errorf("observation %d: signal, but the book's sums stay below H = 10", i+1)
		}
	}
}

// TestCUSUMARL_LucasCrosier: two-sided tabular CUSUM, k = 0.5, h = 4:
// average run length 168 in control and 8.38 at a one-sigma shift
// (Lucas & Crosier 1982, "Fast initial response for CUSUM quality-control
// schemes", Technometrics 24, Table 1, no head start). The table prints
// 168 to the unit and 8.38 to two decimals; the tolerances are half a
// unit of the last digit printed.
func TestCUSUMARL_LucasCrosier(t *testing.T) {
	tests := []struct {
		shift, want, tol float64
	}{
		{0, 168, 0.5},
		{1, 8.38, 0.005},
	}
	for _, tc := range tests {
		got := alert.CUSUMARL(0.5, 4, tc.shift, 200)
		if math.Abs(got-tc.want) > tc.tol {
			t.Errorf("CUSUMARL(k 0.5, h 4, shift %v) = %.4f, want %v ± %v (Lucas & Crosier Table 1)", tc.shift, got, tc.want, tc.tol)
		}
	}
	// The chain converges: 100 states agree with 400 to 0.1%.
	a, b := alert.CUSUMARL(0.5, 4, 0, 100), alert.CUSUMARL(0.5, 4, 0, 400)
	if math.Abs(a-b)/b > 1e-3 {
		t.Errorf("CUSUMARL with 100 states %v, with 400 %v: not converged", a, b)
	}
	// StepH inverts it.
	h := alert.StepH(0.5, 168)
	if math.Abs(h-4) > 0.01 {
		t.Errorf("StepH(0.5, ARL0 168) = %v, want about 4", h)
	}
}

// TestStepDetector_RunLengthsMonteCarlo runs the detector itself on
// N(shift, 1) errors until it signals and compares the mean run length
// with Lucas & Crosier's 168 (in control) and 8.38 (one-sigma shift),
// k = 0.5, h = 4. Run lengths are close to geometric, so their SD is
// about their mean and the tolerance is 4 standard errors of the mean.
func TestStepDetector_RunLengthsMonteCarlo(t *testing.T) {
	const seed = 19820101
	t.Logf("seed %d", seed)
	tests := []struct {
		name        string
		shift, want float64
		runs        int
	}{
		{"in control", 0, 168, 3000},
		{"one sigma", 1, 8.38, 3000},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			rng := rand.New(rand.NewPCG(seed, uint64(tc.shift*10)))
			var sum, sum2 float64
			for range tc.runs {
				d, err := alert.NewStepDetector(alert.StepSettings{K: 0.5, H: 4})
				if err != nil {
					t.Fatal(err)
				}
				n := 0
				for {
					n++
					z := tc.shift + rng.NormFloat64()
					if d.Update(t0, z, z).Signal {
						break
					}
				}
				sum += float64(n)
				sum2 += float64(n) * float64(n)
			}
			mean := sum / float64(tc.runs)
			se := math.Sqrt((sum2/float64(tc.runs) - mean*mean) / float64(tc.runs))
			t.Logf("mean run length %.2f ± %.2f (SE) over %d runs; Lucas & Crosier %v", mean, se, tc.runs, tc.want)
			if math.Abs(mean-tc.want) > 4*se {
				t.Errorf("mean run length %.2f, want %v within 4 SE (%.2f)", mean, tc.want, 4*se)
			}
		})
	}
}

// TestStepDetector_ChangePoint: exact arithmetic. 50 errors of 0, then a
// step to z = 2 (raw error 1.0, σ 0.5). With K 0.5 the upper sum grows
// by 1.5 an update: 1.5, 3.0, 4.5 > H = 4 on the third update after the
// step, which dates the change at the first of them and estimates the
// step as the mean raw error since, 1.0. A downward step signals on the
// lower sum the same way.
func TestStepDetector_ChangePoint(t *testing.T) {
	for _, dir := range []float64{1, -1} {
		d, err := alert.NewStepDetector(alert.StepSettings{})
		if err != nil {
			t.Fatal(err)
		}
		var got alert.StepResult
		at := -1
		for i := range 60 {
			z := 0.0
			if i >= 50 {
				z = 2 * dir
			}
			if r := d.Update(t0.Add(time.Duration(i)*time.Hour), z, z/2); r.Signal && at < 0 {
				got, at = r, i
			}
		}
		if at != 52 || !got.Since.Equal(t0.Add(50*time.Hour)) || got.Size != dir || got.Up != (dir > 0) || got.Updates != 3 {
			t.Errorf("step %+v: signal at update %d %+v, want at 52, since update 50, size %v, 3 updates", 2*dir, at, got, dir)
		}
	}
	// The signal raises a step alert dated at the change.
	r := alert.DefaultRule()
	r.Unit, r.Tolerance, r.Limits.Slope.Warning, r.Detect.Step.On = "kPa", 1, 0.1, true
	tr := mustTracker(t, "qm.x", r)
	sig := alert.StepResult{Signal: true, Up: true, Since: t0.Add(50 * time.Hour), Size: 1, Updates: 3}
	dec, err := tr.Observe(t0.Add(52*time.Hour), sig.Finding(month, 4))
	if err != nil {
		t.Fatal(err)
	}
	if len(dec.Events) != 1 || dec.Events[0].Kind != alert.Step || !dec.Events[0].First.Equal(sig.Since) || dec.Events[0].Value != 1 || dec.Events[0].Limit != 4 {
		t.Errorf("step signal observed: events %+v, want one step raise since %v, size 1", dec.Events, sig.Since)
	}
	// Non-finite input is ignored.
	d, _ := alert.NewStepDetector(alert.StepSettings{})
	if r := d.Update(t0, math.NaN(), 0); r != (alert.StepResult{}) {
		t.Errorf("Update(NaN) = %+v, want the zero result", r)
	}
}

// TestStepDetector_StepVersusDrift feeds readings every 5 minutes,
// N(0, 1) noise, through a 1-day window of 1-hour panes and gives the
// detector each reading's one-step-ahead error against the line fit
// made before it. A ramp of 2 units a day, which the line follows, must
// not signal in 20 days; a step of 2σ on top of the same ramp must
// signal within a day, dated within 2 hours of the truth and sized
// within 0.5 of it. The decision interval comes from StepH for an
// in-control run length of 10⁷ readings (about 95 years at this rate),
// so a false signal in these 5,760 readings has probability about
// 6e-4.
func TestStepDetector_StepVersusDrift(t *testing.T) {
	const seed = 42
	t.Logf("seed %d", seed)
	h := alert.StepH(0.5, 1e7)
	spec := rolling.WindowSpec{Span: day, Pane: time.Hour}
	stepAt := t0.Add(15 * day)
	for _, step := range []float64{0, 2} {
		rng := rand.New(rand.NewPCG(seed, uint64(step)))
		s, err := rolling.NewSensor(spec)
		if err != nil {
			t.Fatal(err)
		}
		d, err := alert.NewStepDetector(alert.StepSettings{K: 0.5, H: h})
		if err != nil {
			t.Fatal(err)
		}
		var signals []alert.StepResult
		var at []time.Time
		for now := t0; now.Before(t0.Add(20 * day)); now = now.Add(5 * time.Minute) {
			v := 2*now.Sub(t0).Hours()/24 + rng.NormFloat64()
			if step > 0 && !now.Before(stepAt) {
				v += step
			}
			if now.Sub(t0) >= 2*day {
				sol := s.Solve(0)
				if z, e, ok := alert.OneStepError(&sol.Line, now, v, 1); ok {
					if r := d.Update(now, z, e); r.Signal {
						signals, at = append(signals, r), append(at, now)
					}
				}
			}
			if err := s.Add(rolling.Reading{UnixNano: now.UnixNano(), Value: v}); err != nil {
				t.Fatal(err)
			}
		}
		t.Logf("h %.3f, step %v: %d signals", h, step, len(signals))
		if step == 0 {
			if len(signals) > 0 {
				t.Errorf("ramp without step: %d signals, first %+v at %v; want none", len(signals), signals[0], at[0])
			}
			continue
		}
		if len(signals) == 0 {
			t.Fatalf("step of %v: no signal", step)
		}
		r := signals[0]
		t.Logf("step of %v at %v: signal at %v, change dated %v, size %.3f over %d readings",
			step, stepAt, at[0], r.Since, r.Size, r.Updates)
		if at[0].Before(stepAt) || at[0].Sub(stepAt) > day {
			t.Errorf("signal at %v, want within a day after %v", at[0], stepAt)
		}
		if dt := r.Since.Sub(stepAt); dt < -2*time.Hour || dt > 2*time.Hour {
			t.Errorf("change dated %v, want within 2 h of %v", r.Since, stepAt)
		}
		if math.Abs(r.Size-step) > 0.5 {
			t.Errorf("size %.3f, want %v ± 0.5", r.Size, step)
		}
	}
}

// TestOneStepError, worked by hand: a line fit y = 10 + 2τ (τ in days
// from Last) with residual SD 1, Var(c0) = 0.04, Var(c1) = 0.01,
// Cov(c0, c1) = 0.005. Half a day ahead, x = (1, 0.5):
// xᵀ·Cov·x = 0.04 + 2·0.5·0.005 + 0.25·0.01 = 0.0475; for a mean of 4
// readings the variance is 1/4 + 0.0475 = 0.2975. A value of 12 has
// e = 12 − 11 = 1 and z = 1/√0.2975 = 1.833396...
func TestOneStepError(t *testing.T) {
	f := rolling.Fit{Model: rolling.Line, N: 30, DF: 28, Last: t0, ResidSD: 1, TCrit: tcrit28, PosDef: true, Cond: 3,
		Coef: [3]float64{10, 2}, SE: [3]float64{0.2, 0.1}}
	f.Cov[0][0], f.Cov[1][1], f.Cov[0][1], f.Cov[1][0] = 0.04, 0.01, 0.005, 0.005
	z, e, ok := alert.OneStepError(&f, t0.Add(12*time.Hour), 12, 4)
	if !ok || e != 1 || math.Abs(z-1/math.Sqrt(0.2975)) > 1e-12 {
		t.Errorf("OneStepError = %v, %v, %v; want z %v, e 1", z, e, ok, 1/math.Sqrt(0.2975))
	}
	bad := f
	bad.Err = rolling.ErrSingular
	for _, c := range []struct {
		name  string
		f     *rolling.Fit
		v     float64
		count int
	}{
		{"unusable fit", &bad, 12, 1},
		{"no readings", &f, 12, 0},
		{"NaN value", &f, math.NaN(), 1},
		{"nil fit", nil, 12, 1},
	} {
		if _, _, ok := alert.OneStepError(c.f, t0, c.v, c.count); ok {
			t.Errorf("OneStepError(%s) ok, want refused", c.name)
		}
	}
}

// TestStepDetector_NISTEWMAExample feeds the 20 data values of the
// NIST/SEMATECH e-Handbook §6.3.2.4 EWMA example (target 50, s = 2.0539,
// λ = 0.3, L = 3; https://www.itl.nist.gov/div898/handbook/pmc/section3/pmc324.htm)
// through StepDetector as standardised errors. The data and the EWMA
// column (to two decimals) are the handbook page's, as transcribed in
// several independent public copies, which agree; no EWMA of the example
// leaves the limits 47.4115 .. 52.5884.
func TestStepDetector_NISTEWMAExample(t *testing.T) {
	const target, s, lambda = 50, 2.0539, 0.3
	data := []float64{52.0, 47.0, 53.0, 49.3, 50.1, 47.0, 51.0, 50.1, 51.2, 50.5,
		49.6, 47.6, 49.9, 51.3, 47.8, 51.2, 52.6, 52.4, 53.6, 52.1}
	// EWMA_i = λ·x_i + (1−λ)·EWMA_{i−1}, EWMA_0 = 50, as the handbook
	// prints them.
	want := []float64{50.60, 49.52, 50.56, 50.18, 50.16, 49.21, 49.75, 49.85, 50.26, 50.33,
		50.11, 49.36, 49.52, 50.05, 49.38, 49.92, 50.73, 51.23, 51.94, 51.99}
	d, err := alert.NewStepDetector(alert.StepSettings{Lambda: lambda, L: 3, H: 100})
	if err != nil {
		t.Fatal(err)
	}
	at := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	for i, x := range data {
		r := d.Update(at.Add(time.Duration(i)*time.Hour), (x-target)/s, x-target)
		ewma := target + s*r.EWMA
		if math.Abs(ewma-want[i]) > 0.005+1e-9 {
			t.Errorf("EWMA %d = %.4f, want %.2f (NIST §6.3.2.4)", i+1, ewma, want[i])
		}
		if r.EWMAOut {
			t.Errorf("EWMA %d = %.4f out of the limits 47.4115 .. 52.5884", i+1, ewma)
		}
	}
}

// TestStepDetector_NISTCUSUMExample: the tabular CUSUM example of the
// NIST/SEMATECH e-Handbook of Statistical Methods, §6.3.2.3
// (https://www.itl.nist.gov/div898/handbook/pmc/section3/pmc323.htm):
// target 325, k = 0.3175, h = 4.1959, 20 observations. The data are
// those of the handbook page as transcribed in two independent public
// copies, which agree. The handbook's table first exceeds h at
// observation 14 and shows S_hi = 19.04 at observation 20: its rows add
// each increment x − 325 − k rounded to two decimals (3.0125 → 3.01 …),
// which the test reproduces; the unrounded sum is 19.06.
func TestStepDetector_NISTCUSUMExample(t *testing.T) {
	const target, k, h = 325, 0.3175, 4.1959
	x := []float64{324.93, 324.68, 324.73, 324.35, 325.35, 325.23, 324.13, 324.53, 325.23, 324.60,
		324.63, 325.15, 328.33, 327.25, 327.83, 328.50, 326.68, 327.78, 326.88, 328.35}
	at := func(i int) time.Time { return t0.Add(time.Duration(i) * time.Hour) }

	// Without a decision interval in reach the sums run on as the table's.
	d, err := alert.NewStepDetector(alert.StepSettings{K: k, H: 1e6})
	if err != nil {
		t.Fatal(err)
	}
	first, hi, rounded := 0, 0.0, 0.0
	for i, v := range x {
		r := d.Update(at(i), v-target, v-target)
		hi = max(0, hi+v-target-k)
		rounded = max(0, rounded+math.RoundToEven((v-target-k)*100)/100)
		if math.Abs(r.Hi-hi) > 1e-9 {
			t.Errorf("observation %d: S_hi = %.6f, want %.6f", i+1, r.Hi, hi)
		}
		if first == 0 && r.Hi > h {
			first = i + 1
		}
	}
	if first != 14 {
		t.Errorf("S_hi first exceeds h = %g at observation %d, want 14 (NIST §6.3.2.3)", h, first)
	}
	if math.Abs(hi-19.06) > 1e-9 || math.Abs(rounded-19.04) > 1e-9 {
		t.Errorf("S_hi at 20 = %.4f (rounded rows %.4f), want 19.06 (19.04 as the handbook prints it)", hi, rounded)
	}

	// With h = 4.1959 the detector signals at observation 14: an upward
	// step that began at observation 13 (the sum was zero at 12), of
	// size the mean error since, (3.33 + 2.25)/2 = 2.79.
	d, err = alert.NewStepDetector(alert.StepSettings{K: k, H: h})
	if err != nil {
		t.Fatal(err)
	}
	for i, v := range x[:14] {
		r := d.Update(at(i), v-target, v-target)
		if r.Signal != (i == 13) {
			t.Fatalf("observation %d: signal %v, want it at 14 only", i+1, r.Signal)
		}
		if r.Signal && (!r.Up || !r.Since.Equal(at(12)) || math.Abs(r.Size-2.79) > 1e-9 || r.Updates != 2) {
			t.Errorf("signal: up %v since %v size %.4f over %d, want up since observation 13 (%v), size 2.79 over 2",
				r.Up, r.Since, r.Size, r.Updates, at(12))
		}
	}
}
