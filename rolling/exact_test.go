package rolling_test

import (
	"errors"
	"fmt"
	"math"
	"math/big"
	"math/rand/v2"
	"testing"
	"time"

	"driftfit/rolling"
)

// exactResult is an ordinary least-squares fit computed in exact rational
// arithmetic (math/big.Rat) and rounded to float64 once at the end, in the
// units of rolling.Fit: τ = (t − newest) in days.
type exactResult struct {
	coef, se    [3]float64
	residSD, r2 float64
	rss         float64
}

// exactFit is the reference of the precision tests: the normal equations
// XᵀX·b = Xᵀy in x = t − t_newest, integer nanoseconds, are formed and
// solved by Gaussian elimination without any rounding (the float64
// values are exact binary fractions), then RSS = Σ(y − Xb)² and
// TSS = Σ(y − ȳ)² exactly. Only the final results are rounded: σ² =
// RSS/(n − p), Cov = σ²(XᵀX)⁻¹, SE_j = √Cov_jj · day^j, R² = 1 − RSS/TSS
// (Draper & Smith, Applied Regression Analysis, 3rd ed., ch. 5).
func exactFit(rs []rolling.Reading, p int) exactResult {
	last := rs[0].UnixNano
	for _, r := range rs {
		last = max(last, r.UnixNano)
	}
	n := len(rs)
	xs := make([]*big.Rat, n)
	ys := make([]*big.Rat, n)
	for i, r := range rs {
		xs[i] = new(big.Rat).SetInt64(r.UnixNano - last)
		ys[i] = new(big.Rat).SetFloat64(r.Value)
	}
	var g [3][4]*big.Rat // augmented [XᵀX | Xᵀy]
	for a := range p {
		for b := range p + 1 {
			g[a][b] = new(big.Rat)
		}
	}
	pow := func(x *big.Rat, k int) *big.Rat {
		v := big.NewRat(1, 1)
		for range k {
			v.Mul(v, x)
		}
		return v
	}
	tmp := new(big.Rat)
	for i := range n {
		var pw [5]*big.Rat
		for k := range 2*p - 1 {
			pw[k] = pow(xs[i], k)
		}
		for a := range p {
			for b := range p {
				g[a][b].Add(g[a][b], pw[a+b])
			}
			g[a][p].Add(g[a][p], tmp.Mul(pw[a], ys[i]))
		}
	}
	// Inverse of XᵀX by Gauss–Jordan, then b = (XᵀX)⁻¹Xᵀy.
	var m [3][6]*big.Rat
	for a := range p {
		for b := range 2 * p {
			m[a][b] = new(big.Rat)
			if b < p {
				m[a][b].Set(g[a][b])
			} else if b-p == a {
				m[a][b].SetInt64(1)
			}
		}
	}
	for c := range p {
		piv := new(big.Rat).Set(m[c][c])
		for b := range 2 * p {
			m[c][b].Quo(m[c][b], piv)
		}
		for r := range p {
			if r == c {
				continue
			}
			f := new(big.Rat).Set(m[r][c])
			for b := range 2 * p {
				m[r][b].Sub(m[r][b], tmp.Mul(f, m[c][b]))
			}
		}
	}
	beta := make([]*big.Rat, p)
	for a := range p {
		beta[a] = new(big.Rat)
		for b := range p {
			beta[a].Add(beta[a], tmp.Mul(m[a][p+b], g[b][p]))
		}
	}
	rss, mean, tss := new(big.Rat), new(big.Rat), new(big.Rat)
	for i := range n {
		e := new(big.Rat).Set(ys[i])
		for a := range p {
			e.Sub(e, tmp.Mul(beta[a], pow(xs[i], a)))
		}
		rss.Add(rss, e.Mul(e, e))
		mean.Add(mean, ys[i])
	}
	mean.Quo(mean, big.NewRat(int64(n), 1))
	for i := range n {
		d := new(big.Rat).Sub(ys[i], mean)
		tss.Add(tss, d.Mul(d, d))
	}
	var res exactResult
	s2 := new(big.Rat).Quo(rss, big.NewRat(int64(n-p), 1))
	dayNs := big.NewRat(86400e9, 1)
	unit := big.NewRat(1, 1)
	for a := range p {
		c := new(big.Rat).Mul(beta[a], unit)
		res.coef[a], _ = c.Float64()
		v := new(big.Rat).Mul(s2, m[a][p+a])
		v.Mul(v, unit)
		v.Mul(v, unit)
		f, _ := v.Float64()
		res.se[a] = math.Sqrt(f)
		unit.Mul(unit, dayNs)
	}
	res.rss, _ = rss.Float64()
	sd, _ := s2.Float64()
	res.residSD = math.Sqrt(sd)
	if tss.Sign() > 0 {
		r2 := new(big.Rat).Quo(rss, tss)
		r2.Sub(big.NewRat(1, 1), r2)
		res.r2, _ = r2.Float64()
	}
	return res
}

// checkDigits compares a fit with the exact reference, at least minLRE
// significant digits in every coefficient (relative to max(|c|, SE), as
// in compareBatch), standard error, the residual SD and R².
func checkDigits(t *testing.T, f *rolling.Fit, ref exactResult, minLRE float64) {
	t.Helper()
	if !f.OK() {
		t.Fatalf("%v fit: %v", f.Model, f.Err)
	}
	digits := func(got, want, scale float64) float64 {
		if got == want {
			return 16
		}
		return -math.Log10(math.Abs(got-want) / scale)
	}
	check := func(what string, got, want, scale float64) {
		t.Helper()
		d := digits(got, want, scale)
		t.Logf("%v %-7s got %.16g want %.16g digits %.1f", f.Model, what, got, want, d)
		if !(d >= minLRE) {
			t.Errorf("%v %s = %.16g, want %.16g (%.1f digits < %g)", f.Model, what, got, want, d, minLRE)
		}
	}
	for j := range f.Model.Coefs() {
		check(fmt.Sprintf("c%d", j), f.Coef[j], ref.coef[j], max(math.Abs(ref.coef[j]), ref.se[j]))
		check(fmt.Sprintf("se%d", j), f.SE[j], ref.se[j], ref.se[j])
	}
	check("residSD", f.ResidSD, ref.residSD, ref.residSD)
	check("R2", f.R2, ref.r2, 1)
}

// TestSolve_ExactRational_EdgeCases puts readings where float64 sums lose
// digits and checks the fits against exact rational least squares to 10
// significant digits. With time measured from the pane's centre (the
// earlier layout) the first four cases kept 6 to 7 digits (Norris) and
// 3 (1-ns steps), and the fifth had the wrong slope.
func TestSolve_ExactRational_EdgeCases(t *testing.T) {
	norris, _ := loadNIST(t, "Norris")
	dayStart := time.Date(2026, 6, 15, 0, 0, 0, 0, time.UTC).UnixNano()
	var bunched []rolling.Reading
	for _, p := range norris {
		// x of 0.2 to 999 s, put into the last 1000 s of a one-day pane.
		bunched = append(bunched, rolling.Reading{UnixNano: dayStart + day - 1000e9 + p.ns, Value: p.y})
	}
	seed := uint64(20261203)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 1))
	var nsSteps []rolling.Reading
	for k := range int64(2000) {
		// 2000 readings 1 ns apart in a one-second pane, a slope of
		// 1e-6 per ns and noise of 1e-4 on a level of 50.
		nsSteps = append(nsSteps, rolling.Reading{UnixNano: dayStart + 3e8 + k, Value: 50 + 1e-6*float64(k) + 1e-4*rng.NormFloat64()})
	}
	// 5000 readings at one instant 100 s before the end of a one-day
	// pane, and two more 50 s and 1 s before it: with time measured from
	// the pane's centre this gave a slope of 173 ± 16 against the exact
	// −543, an "ok" fit whose interval excluded the truth.
	var instant []rolling.Reading
	for range 5000 {
		instant = append(instant, rolling.Reading{UnixNano: dayStart + day - 100e9, Value: 20 + 0.01*rng.NormFloat64()})
	}
	instant = append(instant,
		rolling.Reading{UnixNano: dayStart + day - 50e9, Value: 20.25},
		rolling.Reading{UnixNano: dayStart + day - 1e9, Value: 20.125})
	cases := []struct {
		name  string
		spec  rolling.WindowSpec
		rs    []rolling.Reading
		model rolling.Model
	}{
		{"Norris in the last 1000 s of a 1-day pane", rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour}, bunched, rolling.Line},
		{"Norris parabola in the last 1000 s of a 1-day pane", rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour}, bunched, rolling.Parabola},
		{"1-ns steps in a 1-s pane", rolling.WindowSpec{Span: time.Minute, Pane: time.Second}, nsSteps, rolling.Line},
		{"1-ns steps in a 1-s pane, parabola", rolling.WindowSpec{Span: time.Minute, Pane: time.Second}, nsSteps, rolling.Parabola},
		{"5000 readings at one instant plus 2", rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour}, instant, rolling.Parabola},
		{"5000 readings at one instant plus 2, line", rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour}, instant, rolling.Line},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			s := newSensor(t, tc.spec)
			for _, r := range tc.rs {
				if err := s.Add(r); err != nil {
					t.Fatal(err)
				}
			}
			sol := s.Solve(0)
			f := sol.Fit(tc.model)
			if f.Err != nil {
				t.Fatalf("fit error %v", f.Err)
			}
			ref := exactFit(tc.rs, tc.model.Coefs())
			checkDigits(t, f, ref, 10)
			// The exact slope lies inside the 95% interval.
			if lo, hi := f.CI[1][0], f.CI[1][1]; !(lo <= ref.coef[1] && ref.coef[1] <= hi) {
				t.Errorf("slope interval [%g, %g] excludes the exact slope %g", lo, hi, ref.coef[1])
			}
		})
	}
}

// TestSolve_Unresolved checks that readings exactly on a line across a
// pane, whose residual sum is pure rounding, report ErrUnresolved with
// positive (upper-bound) standard errors that cover the exact slope,
// instead of SE = 0 and R² = 1 from a clamped negative sum.
func TestSolve_Unresolved(t *testing.T) {
	s := newSensor(t, rolling.WindowSpec{Span: time.Minute, Pane: time.Second})
	t0 := time.Date(2026, 6, 15, 0, 0, 0, 0, time.UTC).UnixNano()
	var rs []rolling.Reading
	for k := range int64(3000) {
		// y = 0.1 + 0.3·k/1000 for k ns: the values carry rounding of
		// 1 ulp, the exact slope of the readings is not 0.3 per µs.
		rs = append(rs, rolling.Reading{UnixNano: t0 + 1e8 + k, Value: 0.1 + 0.3*float64(k)/1000})
	}
	for _, r := range rs {
		if err := s.Add(r); err != nil {
			t.Fatal(err)
		}
	}
	f := s.Solve(0).Line
	ref := exactFit(rs, 2)
	t.Logf("exact RSS %.3g, exact SE of slope %.3g /day; fit %v SE %.3g", ref.rss, ref.se[1], f.Err, f.SE[1])
	if !errors.Is(f.Err, rolling.ErrUnresolved) || !f.OK() {
		t.Fatalf("Err = %v, want ErrUnresolved (usable)", f.Err)
	}
	if !(f.SE[1] >= ref.se[1]) || !(f.R2 < 1) {
		t.Errorf("SE = %g, R² = %.17g: want an upper bound of the exact SE %g and R² below 1", f.SE[1], f.R2, ref.se[1])
	}
	if math.Abs(f.Coef[1]-ref.coef[1]) > 1e-12*math.Abs(ref.coef[1]) {
		t.Errorf("slope = %.17g, want %.17g", f.Coef[1], ref.coef[1])
	}
}

// TestSensor_Add_OutOfRange checks the accepted range on both sides of
// MaxValue, that a refused reading leaves the sensor exactly as it was,
// and that what Add accepted at the boundary saves and restores.
func TestSensor_Add_OutOfRange(t *testing.T) {
	at := func(h int) int64 { return t2026 + int64(h)*int64(time.Hour) }
	above := math.Nextafter(rolling.MaxValue, math.Inf(1))
	cases := []struct {
		name string
		v    float64
		ok   bool
	}{
		{"max", rolling.MaxValue, true},
		{"-max", -rolling.MaxValue, true},
		{"above max", above, false},
		{"below -max", -above, false},
		{"1e154, square near the overflow", 1e154, false},
		{"1e200, square overflows", 1e200, false},
		{"-1e300", -1e300, false},
		{"smallest subnormal", 5e-324, true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			s, twin := newSensor(t, defaultSpecs...), newSensor(t, defaultSpecs...)
			// The worst partner of a boundary value: the opposite extreme.
			for _, x := range []*rolling.Sensor{s, twin} {
				if err := x.Add(rolling.Reading{UnixNano: at(0), Value: -math.Copysign(rolling.MaxValue, tc.v)}); err != nil {
					t.Fatal(err)
				}
			}
			err := s.Add(rolling.Reading{UnixNano: at(1), Value: tc.v})
			if tc.ok {
				if err != nil {
					t.Fatalf("Add(%g) = %v, want accepted", tc.v, err)
				}
				if err := twin.Add(rolling.Reading{UnixNano: at(1), Value: tc.v}); err != nil {
					t.Fatal(err)
				}
			} else {
				var re *rolling.RangeError
				if !errors.Is(err, rolling.ErrOutOfRange) || !errors.As(err, &re) || re.Value != tc.v {
					t.Fatalf("Add(%g) = %v, want a RangeError naming the value", tc.v, err)
				}
			}
			sameSolutions(t, s, twin)
			// Save and restore: every pane written must load.
			var keys []rolling.PaneKey
			s.Changed(func(k rolling.PaneKey) { keys = append(keys, k) })
			sameSolutions(t, s, copyState(t, s, keys))
		})
	}
}

// TestSolve_TinyValues checks that values whose squared differences fall
// among the subnormal numbers (near 1e-154) are reported as out of range
// (ErrNumeric), not as constant, while equal tiny values stay constant
// and values of 1e-140 fit normally.
func TestSolve_TinyValues(t *testing.T) {
	for _, tc := range []struct {
		scale float64
		step  float64
		want  error
	}{
		{1e-154, 0.1, rolling.ErrNumeric},
		{1e-160, 0.3, rolling.ErrNumeric},
		{1e-154, 0, rolling.ErrConstant},
		{1e-140, 0.1, nil},
		{1e154 / 1e10, 0.1, nil},
	} {
		t.Run(fmt.Sprintf("%g+%g·k", tc.scale, tc.step), func(t *testing.T) {
			s := newSensor(t, rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour})
			for k := range 48 {
				v := tc.scale * (1 + tc.step*float64(k%5) + 0.01*float64(k))
				if tc.step == 0 {
					v = tc.scale
				}
				if err := s.Add(rolling.Reading{UnixNano: t2026 + int64(k)*int64(30*time.Minute), Value: v}); err != nil {
					t.Fatal(err)
				}
			}
			sol := s.Solve(0)
			for _, m := range []rolling.Model{rolling.Line, rolling.Parabola} {
				if f := sol.Fit(m); f.Err != tc.want {
					t.Errorf("%v: Err = %v, want %v", m, f.Err, tc.want)
				}
			}
			if f := sol.Exp; f.Err != nil && f.Err != rolling.ErrConstant {
				t.Errorf("exp: Err = %v; ln y differences are never tiny", f.Err)
			}
		})
	}
}
