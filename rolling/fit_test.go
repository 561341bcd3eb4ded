package rolling_test

import (
	"errors"
	"math"
	"math/rand/v2"
	"reflect"
	"testing"
	"time"

	"driftfit/rolling"
)

var (
	t2026 = time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	day   = int64(24 * time.Hour)
)

func newSensor(t testing.TB, specs ...rolling.WindowSpec) *rolling.Sensor {
	t.Helper()
	s, err := rolling.NewSensor(specs...)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

// finiteFit fails the test if any number in f is NaN or infinite.
func finiteFit(t *testing.T, f *rolling.Fit) {
	t.Helper()
	v := reflect.ValueOf(*f)
	var walk func(reflect.Value, string)
	walk = func(v reflect.Value, path string) {
		switch v.Kind() {
		case reflect.Float64:
			if x := v.Float(); math.IsNaN(x) || math.IsInf(x, 0) {
				t.Errorf("%v fit: %s = %v", f.Model, path, x)
			}
		case reflect.Array:
			for i := 0; i < v.Len(); i++ {
				walk(v.Index(i), path)
			}
		case reflect.Struct:
			for i := 0; i < v.NumField(); i++ {
				if v.Type().Field(i).IsExported() {
					walk(v.Field(i), path+"."+v.Type().Field(i).Name)
				}
			}
		}
	}
	walk(v, "")
}

func TestSensor_Solve_Degenerate(t *testing.T) {
	spec := rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour}
	at := func(h float64) int64 { return t2026 + int64(h*float64(time.Hour)) }
	cases := []struct {
		name                string
		readings            []rolling.Reading
		line, parabola, exp error
	}{
		{"empty", nil, rolling.ErrNotEnoughData, rolling.ErrNotEnoughData, rolling.ErrNotEnoughData},
		{"one", []rolling.Reading{{at(1), 5}}, rolling.ErrNotEnoughData, rolling.ErrNotEnoughData, rolling.ErrNotEnoughData},
		{"two", []rolling.Reading{{at(1), 5}, {at(2), 6}}, rolling.ErrNotEnoughData, rolling.ErrNotEnoughData, rolling.ErrNotEnoughData},
		{"one instant", []rolling.Reading{{at(1), 5}, {at(1), 6}, {at(1), 7}, {at(1), 8}},
			rolling.ErrNoTimeSpread, rolling.ErrNoTimeSpread, rolling.ErrNoTimeSpread},
		{"constant", []rolling.Reading{{at(1), 5}, {at(2), 5}, {at(3.5), 5}, {at(7), 5}},
			rolling.ErrConstant, rolling.ErrConstant, rolling.ErrConstant},
		{"two instants", []rolling.Reading{{at(1), 5}, {at(1), 6}, {at(2), 7}, {at(2), 8}},
			nil, rolling.ErrSingular, nil},
		{"no positive", []rolling.Reading{{at(1), -5}, {at(2), -6}, {at(3), 0}, {at(4), -8}},
			nil, nil, rolling.ErrNotEnoughData},
		{"two positive", []rolling.Reading{{at(1), -5}, {at(2), 6}, {at(3), 0}, {at(4), 8}},
			nil, nil, rolling.ErrNotEnoughData},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			s := newSensor(t, spec)
			for _, r := range tc.readings {
				if err := s.Add(r); err != nil {
					t.Fatalf("Add(%v): %v", r, err)
				}
			}
			sol := s.Solve(0)
			for _, c := range []struct {
				f    *rolling.Fit
				want error
			}{{&sol.Line, tc.line}, {&sol.Parabola, tc.parabola}, {&sol.Exp, tc.exp}} {
				if !errors.Is(c.f.Err, c.want) || (c.want == nil && c.f.Err != nil) {
					t.Errorf("%v: Err = %v, want %v", c.f.Model, c.f.Err, c.want)
				}
				finiteFit(t, c.f)
			}
		})
	}
}

func TestSensor_Solve_ConstantKeepsLevel(t *testing.T) {
	s := newSensor(t, rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour})
	for i := range 10 {
		if err := s.Add(rolling.Reading{UnixNano: t2026 + int64(i)*int64(time.Hour), Value: 101.325}); err != nil {
			t.Fatal(err)
		}
	}
	sol := s.Solve(0)
	if sol.Line.Coef != [3]float64{101.325, 0, 0} || sol.Line.SE != [3]float64{} {
		t.Errorf("constant line: coef %v se %v, want level 101.325 and zero rates and errors", sol.Line.Coef, sol.Line.SE)
	}
}

func TestSensor_Add_Rejects(t *testing.T) {
	s := newSensor(t, rolling.WindowSpec{Span: 3 * time.Hour, Pane: time.Hour}, rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour})
	for _, v := range []float64{math.NaN(), math.Inf(1), math.Inf(-1)} {
		if err := s.Add(rolling.Reading{UnixNano: t2026, Value: v}); !errors.Is(err, rolling.ErrNonFinite) {
			t.Errorf("Add(%v) = %v, want ErrNonFinite", v, err)
		}
	}
	if err := s.Add(rolling.Reading{UnixNano: t2026 + 30*int64(time.Hour), Value: 1}); err != nil {
		t.Fatal(err)
	}
	// 5 h before the newest: too old for the 3 h window, inside the 24 h one.
	if err := s.Add(rolling.Reading{UnixNano: t2026 + 25*int64(time.Hour), Value: 1}); err != nil {
		t.Fatalf("Add inside the long window = %v", err)
	}
	if s.Late(0) != 1 || s.Late(1) != 0 {
		t.Errorf("Late = %d, %d, want 1, 0", s.Late(0), s.Late(1))
	}
	if err := s.Add(rolling.Reading{UnixNano: t2026, Value: 1}); !errors.Is(err, rolling.ErrTooOld) {
		t.Errorf("Add 30 h old = %v, want ErrTooOld", err)
	}
	if n := s.Solve(1).N; n != 2 {
		t.Errorf("N = %d, want 2: a rejected reading must leave no trace", n)
	}
}

// TestSensor_Solve_ExactCurves checks that readings lying exactly on a
// curve give back its coefficients: y = 3 − 0.25τ + 0.125τ² (τ in days)
// sampled every 3 h for 10 days, and y = 50·e^(0.1τ).
func TestSensor_Solve_ExactCurves(t *testing.T) {
	s := newSensor(t, rolling.WindowSpec{Span: 10 * 24 * time.Hour, Pane: 6 * time.Hour})
	last := t2026 + 10*day - 1
	for i := range 80 {
		tn := last - int64(i)*3*int64(time.Hour)
		tau := float64(tn-last) / float64(day)
		if err := s.Add(rolling.Reading{UnixNano: tn, Value: 3 - 0.25*tau + 0.125*tau*tau}); err != nil {
			t.Fatal(err)
		}
	}
	f := s.Solve(0).Parabola
	want := [3]float64{3, -0.25, 0.125}
	for j := range want {
		if math.Abs(f.Coef[j]-want[j]) > 1e-12 {
			t.Errorf("parabola c%d = %.17g, want %g", j, f.Coef[j], want[j])
		}
	}
	e := newSensor(t, rolling.WindowSpec{Span: 10 * 24 * time.Hour, Pane: 6 * time.Hour})
	for i := range 80 {
		tn := last - int64(i)*3*int64(time.Hour)
		tau := float64(tn-last) / float64(day)
		if err := e.Add(rolling.Reading{UnixNano: tn, Value: 50 * math.Exp(0.1*tau)}); err != nil {
			t.Fatal(err)
		}
	}
	g := e.Solve(0).Exp
	if math.Abs(g.Coef[0]-math.Log(50)) > 1e-12 || math.Abs(g.Coef[1]-0.1) > 1e-12 {
		t.Errorf("exp coef = %v, want [ln 50, 0.1]", g.Coef[:2])
	}
	days, _, _, _, err := g.Doubling()
	if err != nil || math.Abs(days-math.Ln2/0.1) > 1e-9 {
		t.Errorf("Doubling = %v, %v, want ln2/0.1 = %v", days, err, math.Ln2/0.1)
	}
}

// TestSensor_Solve_Invariants checks on noisy data that shifting every
// time by the same amount leaves the fit unchanged, and that scaling the
// values scales level, rates, errors and residual SD alike.
func TestSensor_Solve_Invariants(t *testing.T) {
	seed := uint64(20261201)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	spec := rolling.WindowSpec{Span: 7 * 24 * time.Hour, Pane: time.Hour}
	type rd = rolling.Reading
	var rs []rd
	for range 2000 {
		tn := t2026 + rng.Int64N(7*day)
		tau := float64(tn-t2026) / float64(day)
		rs = append(rs, rd{tn, 200 + 0.3*tau - 0.01*tau*tau + rng.NormFloat64()})
	}
	fit := func(shift int64, scale float64) rolling.Solution {
		s := newSensor(t, spec)
		for _, r := range rs {
			if err := s.Add(rd{r.UnixNano + shift, r.Value * scale}); err != nil {
				t.Fatal(err)
			}
		}
		return s.Solve(0)
	}
	base := fit(0, 1)
	shifted := fit(7*day+int64(time.Hour), 1) // whole panes: same readings per pane
	scaled := fit(0, 1000)
	close := func(what string, got, want float64) {
		t.Helper()
		if math.Abs(got-want) > 1e-10*math.Abs(want) {
			t.Errorf("%s = %.17g, want %.17g", what, got, want)
		}
	}
	for _, m := range rolling.Models {
		b, s, c := base.Fit(m), shifted.Fit(m), scaled.Fit(m)
		for j := 0; j < m.Coefs(); j++ {
			close(m.String()+" shifted coef", s.Coef[j], b.Coef[j])
			close(m.String()+" shifted se", s.SE[j], b.SE[j])
			if m != rolling.Exp {
				close(m.String()+" scaled coef", c.Coef[j], 1000*b.Coef[j])
				close(m.String()+" scaled se", c.SE[j], 1000*b.SE[j])
			}
		}
		close(m.String()+" shifted R2", s.R2, b.R2)
		if m == rolling.Exp {
			// ln(1000·y) = ln 1000 + ln y: only the level moves.
			close("exp scaled c0", c.Coef[0], b.Coef[0]+math.Log(1000))
			close("exp scaled c1", c.Coef[1], b.Coef[1])
		}
	}
}

// TestFit_Predict checks the prediction interval of a line against the
// textbook formula for simple linear regression (e.g. Montgomery & Runger,
// Applied Statistics and Probability for Engineers, the prediction
// interval on a future observation):
//
//	ŷ(x₀) ± t(0.975, n−2) · s · √(1 + 1/n + (x₀ − x̄)²/Sxx)
func TestFit_Predict(t *testing.T) {
	seed := uint64(7)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	s := newSensor(t, rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour})
	var xs, ys []float64
	for range 60 {
		tn := t2026 + rng.Int64N(30*day)
		x := float64(tn-t2026) / float64(day)
		y := 20 + 0.05*x + 0.3*rng.NormFloat64()
		xs, ys = append(xs, x), append(ys, y)
		if err := s.Add(rolling.Reading{UnixNano: tn, Value: y}); err != nil {
			t.Fatal(err)
		}
	}
	f := s.Solve(0).Line
	n := float64(len(xs))
	var mx, my float64
	for i := range xs {
		mx += xs[i] / n
		my += ys[i] / n
	}
	var sxx, sxy float64
	for i := range xs {
		sxx += (xs[i] - mx) * (xs[i] - mx)
		sxy += (xs[i] - mx) * (ys[i] - my)
	}
	b1 := sxy / sxx
	b0 := my - b1*mx
	var rss float64
	for i := range xs {
		r := ys[i] - b0 - b1*xs[i]
		rss += r * r
	}
	sd := math.Sqrt(rss / (n - 2))
	x0 := 45.0 // days after t2026: 15 days past the window
	at := time.Unix(0, t2026+int64(x0*float64(day)))
	p, err := f.Predict(at)
	if err != nil {
		t.Fatal(err)
	}
	want := b0 + b1*x0
	half := f.TCrit * sd * math.Sqrt(1+1/n+(x0-mx)*(x0-mx)/sxx)
	for _, c := range []struct {
		what      string
		got, want float64
	}{{"value", p.Value, want}, {"low", p.Low, want - half}, {"high", p.High, want + half}} {
		if math.Abs(c.got-c.want) > 1e-9*math.Abs(c.want) {
			t.Errorf("Predict %s = %.12g, want %.12g", c.what, c.got, c.want)
		}
	}
}

func TestFit_TimeToLimit(t *testing.T) {
	// y = 10 + 0.5τ exactly plus tiny alternating noise, newest reading at τ = 0.
	s := newSensor(t, rolling.WindowSpec{Span: 20 * 24 * time.Hour, Pane: 24 * time.Hour})
	last := t2026 + 20*day - 1
	for i := range 200 {
		tn := last - int64(i)*int64(2*time.Hour)
		tau := float64(tn-last) / float64(day)
		noise := 1e-3 * float64(1-2*(i%2))
		if err := s.Add(rolling.Reading{UnixNano: tn, Value: 10 + 0.5*tau + noise}); err != nil {
			t.Fatal(err)
		}
	}
	f := s.Solve(0).Line
	horizon := 365 * 24 * time.Hour
	days := func(d time.Duration) float64 { return d.Hours() / 24 }
	cases := []struct {
		name  string
		limit float64
		upper bool
		kind  rolling.CrossKind
		at    float64 // days, for CrossAhead
	}{
		{"upper ahead", 20, true, rolling.CrossAhead, 20},
		{"upper past", 9, true, rolling.CrossPast, 0},
		{"lower never", 5, false, rolling.CrossNever, 0},
		{"lower past", 11, false, rolling.CrossPast, 0},
		{"beyond horizon", 1000, true, rolling.CrossNever, 0},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			c, err := f.TimeToLimit(tc.limit, tc.upper, horizon)
			if err != nil {
				t.Fatal(err)
			}
			if c.Kind != tc.kind {
				t.Fatalf("Kind = %v, want %v", c.Kind, tc.kind)
			}
			if tc.kind != rolling.CrossAhead {
				return
			}
			if math.Abs(days(c.At)-tc.at) > 1e-3 {
				t.Errorf("At = %.6f days, want %v", days(c.At), tc.at)
			}
			if !c.EarliestOK || !c.LatestOK || !(c.Earliest < c.At && c.At < c.Latest) {
				t.Errorf("band crossing %v (%v) .. %v (%v) does not bracket %v", c.Earliest, c.EarliestOK, c.Latest, c.LatestOK, c.At)
			}
			// At the band crossings the band edge sits on the limit.
			for _, e := range []struct {
				d    time.Duration
				edge func(rolling.Prediction) float64
			}{{c.Earliest, func(p rolling.Prediction) float64 { return p.High }}, {c.Latest, func(p rolling.Prediction) float64 { return p.Low }}} {
				p, _ := f.Predict(f.Last.Add(e.d))
				if math.Abs(e.edge(p)-tc.limit) > 1e-6 {
					t.Errorf("band edge at %v = %v, want %v", e.d, e.edge(p), tc.limit)
				}
			}
		})
	}
	sol := s.Solve(0)
	if _, err := sol.Exp.TimeToLimit(20, true, horizon); !errors.Is(err, rolling.ErrModel) {
		t.Errorf("exp TimeToLimit err = %v, want ErrModel", err)
	}
}
