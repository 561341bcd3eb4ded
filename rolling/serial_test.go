package rolling_test

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

	"driftfit/rolling"
)

// ar1Window fills a fresh sensor with one window of hourly readings of a
// flat signal plus AR(1) noise x_i = φ·x_{i−1} + e_i, e_i ~ N(0, 1),
// started from its stationary distribution N(0, 1/(1 − φ²)), and returns
// the solution.
func ar1Window(t testing.TB, rng *rand.Rand, spec rolling.WindowSpec, phi float64, t0 int64) rolling.Solution {
	s := newSensor(t, spec)
	x := rng.NormFloat64() / math.Sqrt(1-phi*phi)
	n := int(spec.Span / time.Hour)
	for i := range n {
		if i > 0 {
			x = phi*x + rng.NormFloat64()
		}
		if err := s.Add(rolling.Reading{UnixNano: t0 + int64(i)*int64(time.Hour), Value: 100 + x}); err != nil {
			t.Fatal(err)
		}
	}
	return s.Solve(0)
}

// TestSolve_SerialCoverage fits many independent 30-day windows of 1-day
// panes, hourly readings of a flat signal with AR(1) noise, and counts
// how often the 95% interval of the slope contains the true slope 0. The
// serially corrected interval (CIAdj, Santer et al. 2000, J. Geophys.
// Res. 105(D6), 7337–7356; Weatherhead et al. 1998, J. Geophys. Res.
// 103(D14), 17149–17161) must cover 95% within 3.5 binomial standard
// errors of the count, √(0.95·0.05/K); the plain interval, which assumes
// independent residuals, must fall short of that band.
func TestSolve_SerialCoverage(t *testing.T) {
	seed := uint64(20261203)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 7))
	spec := rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour}
	const K = 600
	tol := 3.5 * math.Sqrt(0.95*0.05/K)
	for _, phi := range []float64{0.5, 0.9} {
		t.Run(fmt.Sprintf("phi=%g", phi), func(t *testing.T) {
			var plain, adj int
			var r1 float64
			for k := range K {
				f := ar1Window(t, rng, spec, phi, t2026+int64(k)*31*day).Line
				if f.SerialErr != nil || !f.OK() {
					t.Fatalf("window %d: fit %v, serial %v; want both estimated (%d pairs)", k, f.Err, f.SerialErr, f.Pairs)
				}
				if f.CI[1][0] <= 0 && 0 <= f.CI[1][1] {
					plain++
				}
				if f.CIAdj[1][0] <= 0 && 0 <= f.CIAdj[1][1] {
					adj++
				}
				r1 += f.R1 / K
			}
			cp, ca := float64(plain)/K, float64(adj)/K
			t.Logf("coverage of the true slope: plain %.3f, corrected %.3f (want 0.95 ± %.3f); mean R1 %.3f", cp, ca, tol, r1)
			if math.Abs(ca-0.95) > tol {
				t.Errorf("corrected coverage %.3f, want 0.95 ± %.3f", ca, tol)
			}
			if cp >= 0.95-tol {
				t.Errorf("plain coverage %.3f is within the band: the simulation does not show serial correlation", cp)
			}
		})
	}
}

// TestSolve_SerialR1MatchesDirect checks R1 and Pairs against the lag-1
// products of residuals computed one reading at a time: residuals of the
// exact rational least-squares fit (exactFit), pairs of consecutive
// readings in time order within each pane whose readings arrived in
// order, and across consecutive such panes. A pane with a late reading
// contributes nothing and breaks the chain. The line's R1 is algebra on
// the pane sums and is held to 1e-9; the parabola's leaves out the
// change of slope within a pane (see serialSums) and is held to 1e-4.
func TestSolve_SerialR1MatchesDirect(t *testing.T) {
	seed := uint64(31)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	spec := rolling.WindowSpec{Span: 10 * 24 * time.Hour, Pane: 24 * time.Hour}
	worst := map[rolling.Model]float64{}
	for c := range 20 {
		w := int64(spec.Pane)
		var rs []rolling.Reading
		x := 0.0
		tn := t2026 + rng.Int64N(w)
		for tn < t2026+10*day {
			x = 0.7*x + rng.NormFloat64()
			tau := float64(tn-t2026) / float64(day)
			rs = append(rs, rolling.Reading{UnixNano: tn, Value: 50 + 0.4*tau - 0.03*tau*tau + 0.2*x})
			tn += rng.Int64N(int64(3 * time.Hour))
			if rng.IntN(40) == 0 {
				tn += day + rng.Int64N(day) // a gap, sometimes a whole empty pane
			}
		}
		// A few late readings: swap with a neighbour in arrival order.
		arrival := slices.Clone(rs)
		for range rng.IntN(4) {
			i := 1 + rng.IntN(len(arrival)-1)
			arrival[i], arrival[i-1] = arrival[i-1], arrival[i]
		}
		s := newSensor(t, spec)
		for _, r := range arrival {
			if err := s.Add(r); err != nil {
				t.Fatal(err)
			}
		}
		sol := s.Solve(0)
		// Which panes saw their readings in time order?
		ordered := map[int64]bool{}
		lastT := map[int64]int64{}
		for _, r := range arrival {
			k := r.UnixNano / w
			if lt, seen := lastT[k]; !seen {
				ordered[k] = true
			} else if r.UnixNano < lt {
				ordered[k] = false
			}
			lastT[k] = max(lastT[k], r.UnixNano)
		}
		for _, m := range []rolling.Model{rolling.Line, rolling.Parabola} {
			ref := exactFit(rs, m.Coefs())
			f := sol.Fit(m)
			last := rs[0].UnixNano
			for _, r := range rs {
				last = max(last, r.UnixNano)
			}
			resid := func(r rolling.Reading) float64 {
				tau := float64(r.UnixNano-last) / float64(day)
				return r.Value - (ref.coef[0] + tau*(ref.coef[1]+tau*ref.coef[2]))
			}
			var prod, rss float64
			pairs := 0
			var prev *rolling.Reading
			for i := range rs { // rs is in time order
				r := &rs[i]
				e := resid(*r)
				rss += e * e
				k := r.UnixNano / w
				if !ordered[k] {
					prev = nil
					continue
				}
				if prev != nil {
					prod += resid(*prev) * e
					pairs++
				}
				prev = r
			}
			want := prod / float64(pairs) / (rss / float64(len(rs)))
			tol := 1e-9
			if m == rolling.Parabola {
				tol = 2e-3
			}
			worst[m] = max(worst[m], math.Abs(f.R1-want))
			if f.Pairs != pairs || math.Abs(f.R1-want) > tol {
				t.Errorf("case %d %v: R1 = %.12f over %d pairs, want %.12f over %d", c, m, f.R1, f.Pairs, want, pairs)
			}
		}
	}
	t.Logf("largest deviation of R1: line %.2g, parabola %.2g", worst[rolling.Line], worst[rolling.Parabola])
}

// TestSolution_WithSerial checks the short-window use: a one-day window
// of hourly readings has too few pairs for its own estimate, and takes
// the estimate of the 30-day window of the same sensor.
func TestSolution_WithSerial(t *testing.T) {
	seed := uint64(5)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	s := newSensor(t, rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour}, rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour})
	x := 0.0
	for i := range 30 * 24 {
		x = 0.5*x + rng.NormFloat64()
		if err := s.Add(rolling.Reading{UnixNano: t2026 + int64(i)*int64(time.Hour), Value: 10 + x}); err != nil {
			t.Fatal(err)
		}
	}
	short, long := s.Solve(0), s.Solve(1)
	if !errors.Is(short.Line.SerialErr, rolling.ErrSerialUnknown) || short.Line.Pairs != 23 {
		t.Fatalf("1-day window: SerialErr %v over %d pairs, want ErrSerialUnknown over 23", short.Line.SerialErr, short.Line.Pairs)
	}
	if long.Parabola.SerialErr != nil {
		t.Fatalf("30-day window: %v", long.Parabola.SerialErr)
	}
	adj := short.WithSerial(long.Parabola.R1, long.Parabola.Pairs)
	f := adj.Line
	// By hand: n_e = n(1 − r)/(1 + r), SE·√((n − 2)/(n_e − 2)) (Santer et al. 2000, eqs. 4–6).
	r := long.Parabola.R1
	ne := 24 * (1 - r) / (1 + r)
	want := f.SE[1] * math.Sqrt(22/(ne-2))
	if f.SerialErr != nil || math.Abs(f.NEff-ne) > 1e-12*ne || math.Abs(f.SEAdj[1]-want) > 1e-12*want {
		t.Errorf("borrowed r1 %.4f: SerialErr %v, NEff %.6g (want %.6g), SEAdj %.6g (want %.6g)", r, f.SerialErr, f.NEff, ne, f.SEAdj[1], want)
	}
	if f.TCritAdj != rolling.StudentQuantile(0.975, float64(int(ne)-2)) {
		t.Errorf("TCritAdj %v, want the 97.5%% quantile with ⌊n_e⌋ − 2 = %d degrees of freedom", f.TCritAdj, int(ne)-2)
	}
	// The original is unchanged, and r1 = 0.9 leaves 24 readings too few.
	if short.Line.SerialErr == nil {
		t.Error("WithSerial changed its receiver")
	}
	if g := short.WithSerial(0.9, 700).Line; !errors.Is(g.SerialErr, rolling.ErrSerialUnknown) {
		t.Errorf("r1 0.9 on 24 readings (n_e 1.3): SerialErr %v, want ErrSerialUnknown", g.SerialErr)
	}
}

// A sensor with a one-day window of hourly panes and a 30-day window:
// the one-day window's 23 pairs are too few for its own estimate, so it
// is judged with the 30-day window's. The noise is AR(1) with φ = 0.5
// from a fixed pseudo-random sequence.
func ExampleSolution_WithSerial() {
	s, err := rolling.NewSensor(
		rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour},
		rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour})
	if err != nil {
		panic(err)
	}
	start := time.Date(2026, 4, 1, 0, 0, 0, 0, time.UTC)
	rng := rand.New(rand.NewPCG(3, 4))
	x := 0.0
	for i := range 30 * 24 {
		x = 0.5*x + rng.NormFloat64()
		if err := s.Add(rolling.Reading{UnixNano: start.Add(time.Duration(i) * time.Hour).UnixNano(), Value: 20 + x}); err != nil {
			panic(err)
		}
	}
	day, month := s.Solve(0), s.Solve(1)
	fmt.Println("1-day window alone:", day.Line.SerialErr)
	long := month.Parabola
	fmt.Printf("30-day window: r1 %.2f over %d pairs\n", long.R1, long.Pairs)
	adj := day.WithSerial(long.R1, long.Pairs)
	fmt.Printf("1-day slope SE %.2f, corrected %.2f\n", adj.Line.SE[1], adj.Line.SEAdj[1])
	// Output:
	// 1-day window alone: rolling: serial correlation unknown
	// 30-day window: r1 0.53 over 719 pairs
	// 1-day slope SE 0.61, corrected 1.25
}
