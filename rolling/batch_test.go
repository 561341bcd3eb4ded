package rolling_test

import (
	"cmp"
	"encoding/csv"
	"errors"
	"flag"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"testing"
	"time"

	"gonum.org/v1/gonum/mat"

	"driftfit/rolling"
)

var batchSeed = flag.Uint64("seed", 20260615, "seed of the randomised windows of TestSolve_MatchesBatchQR and TestSolve_LongRun")

// batchTol is the agreement required between the windowed fit and the
// batch reference: the project's target of agreement to 1e-9 relative.
const batchTol = 1e-9

// batchObs is one reading as the reference sees it.
type batchObs struct {
	t int64 // Unix ns
	y float64
}

// batchResult is the batch least-squares fit of one model, in the units
// of rolling.Fit: τ = (t − newest) in days, c0 at τ = 0.
type batchResult struct {
	n, excluded int
	first, last int64
	coef, se    [3]float64
	residSD, r2 float64
}

var errBatchTooFew = errors.New("batch: no more rows than coefficients")

// batchFit is the reference: ordinary least squares by Householder QR of
// the design matrix (gonum mat.QR), which never forms the normal
// equations and so shares no arithmetic with the windowed engine.
//
// Time enters as s = (t − t_newest)/scale, the difference taken exactly in
// int64 ns before the one rounding to float64; scale (the window span)
// keeps s in [−1, 0] so the columns 1, s, s² are of similar size and the
// QR well conditioned. Residuals are computed explicitly as y − Xβ̂;
// Cov(β̂) = σ̂²(RᵀR)⁻¹ = σ̂²R⁻¹R⁻ᵀ with σ̂² = RSS/(n − p) (Draper & Smith,
// Applied Regression Analysis, 3rd ed., ch. 5; Golub & Van Loan, Matrix
// Computations, 4th ed., §5.3). The coefficients and standard errors are
// then unscaled to per-day units: c_j = β_j/D^j with D = scale in days.
// For Exp the response is ln y over the readings with y > 0 (math.Log of
// the standard library).
func batchFit(rs []batchObs, m rolling.Model, scale int64) (batchResult, error) {
	var res batchResult
	if len(rs) == 0 {
		return res, errBatchTooFew
	}
	res.first, res.last = rs[0].t, rs[0].t
	for _, r := range rs {
		res.first = min(res.first, r.t)
		res.last = max(res.last, r.t)
	}
	p := m.Coefs()
	rows := 0
	for _, r := range rs {
		if m != rolling.Exp || r.y > 0 {
			rows++
		}
	}
	res.n, res.excluded = rows, len(rs)-rows
	if rows <= p {
		return res, errBatchTooFew
	}
	x := mat.NewDense(rows, p, nil)
	y := mat.NewVecDense(rows, nil)
	i := 0
	for _, r := range rs {
		v := r.y
		if m == rolling.Exp {
			if v <= 0 {
				continue
			}
			v = math.Log(v)
		}
		s := float64(r.t-res.last) / float64(scale)
		x.Set(i, 0, 1)
		x.Set(i, 1, s)
		if p == 3 {
			x.Set(i, 2, s*s)
		}
		y.SetVec(i, v)
		i++
	}
	var qr mat.QR
	qr.Factorize(x)
	var beta mat.VecDense
	if err := qr.SolveVecTo(&beta, false, y); err != nil {
		return res, fmt.Errorf("batch: solve: %w", err)
	}
	var rss, mean float64
	for i := range rows {
		var fit float64
		for j := range p {
			fit += x.At(i, j) * beta.AtVec(j)
		}
		e := y.AtVec(i) - fit
		rss += e * e
		mean += y.AtVec(i)
	}
	mean /= float64(rows)
	var tss float64
	for i := range rows {
		d := y.AtVec(i) - mean
		tss += d * d
	}
	var r mat.Dense
	qr.RTo(&r)
	rt := mat.NewTriDense(p, mat.Upper, nil)
	for a := range p {
		for b := a; b < p; b++ {
			rt.SetTri(a, b, r.At(a, b))
		}
	}
	var ri mat.TriDense
	if err := ri.InverseTri(rt); err != nil {
		return res, fmt.Errorf("batch: invert R: %w", err)
	}
	s2 := rss / float64(rows-p)
	days := float64(scale) / batchNsPerDay
	unit := 1.0
	for j := range p {
		var v float64 // ((RᵀR)⁻¹)_jj = Σ_k (R⁻¹)_jk²
		for k := j; k < p; k++ {
			v += ri.At(j, k) * ri.At(j, k)
		}
		res.coef[j] = beta.AtVec(j) / unit
		res.se[j] = math.Sqrt(s2*v) / unit
		unit *= days
	}
	res.residSD = math.Sqrt(s2)
	res.r2 = 1 - rss/tss
	return res, nil
}

const batchNsPerDay = 86400e9

// compareBatch checks a windowed fit against the batch reference.
//
// A coefficient is compared relative to max(|reference|, its reference
// standard error). Relative to its own size alone would ask the
// impossible of a coefficient the data do not determine: a curvature
// indistinguishable from zero is itself of the size of its noise, and
// any two correct methods agree on it only to rounding of the data's
// scale, which its standard error measures. For a significant
// coefficient (|c| ≫ SE) the test is plain relative error. Standard
// errors and ResidSD are held to tol relative.
// It returns the largest relative error seen.
func compareBatch(t *testing.T, what string, f *rolling.Fit, ref batchResult, tol float64) (worst float64) {
	t.Helper()
	if f.Err != nil {
		t.Errorf("%s: fit error %v, want a fit of %d readings", what, f.Err, ref.n)
		return math.Inf(1)
	}
	if f.N != ref.n || f.Excluded != ref.excluded {
		t.Errorf("%s: N, Excluded = %d, %d, want %d, %d", what, f.N, f.Excluded, ref.n, ref.excluded)
	}
	if got, want := f.First.UnixNano(), ref.first; got != want {
		t.Errorf("%s: First = %d, want %d", what, got, want)
	}
	if got, want := f.Last.UnixNano(), ref.last; got != want {
		t.Errorf("%s: Last = %d, want %d", what, got, want)
	}
	rel := func(got, want, scale float64) float64 {
		if got == want {
			return 0
		}
		return math.Abs(got-want) / scale
	}
	check := func(name string, got, want, scale float64) {
		t.Helper()
		e := rel(got, want, scale)
		worst = max(worst, e)
		if !(e <= tol) {
			t.Errorf("%s: %s = %.17g, want %.17g (rel err %.2g > %g)", what, name, got, want, e, tol)
		}
	}
	for j := range f.Model.Coefs() {
		check(fmt.Sprintf("c%d", j), f.Coef[j], ref.coef[j], max(math.Abs(ref.coef[j]), ref.se[j]))
		check(fmt.Sprintf("se%d", j), f.SE[j], ref.se[j], ref.se[j])
	}
	check("ResidSD", f.ResidSD, ref.residSD, ref.residSD)
	// R² = 1 − RSS/TSS lies in [0, 1] and is held to tol absolute, which
	// is tol relative for the usual R² of order one. Relative to a tiny R²
	// (a fit that explains almost nothing) the check would demand digits
	// that the subtraction 1 − RSS/TSS cancels in any float64 method; RSS
	// itself is held to tol relative through ResidSD above.
	check("R2", f.R2, ref.r2, 1)
	return worst
}

// batchLogUniform returns a value with ln uniform in [ln lo, ln hi].
func batchLogUniform(rng *rand.Rand, lo, hi float64) float64 {
	return math.Exp(math.Log(lo) + rng.Float64()*(math.Log(hi)-math.Log(lo)))
}

// batchCase is one randomised stream of readings.
type batchCase struct {
	specs    []rolling.WindowSpec
	arrivals []batchObs // in arrival order
	desc     string
}

// batchPaneChoices are the pane widths drawn; the count of panes per window is
// then drawn so that the span lies between a minute and a year.
var batchPaneChoices = []time.Duration{
	time.Second, 10 * time.Second, time.Minute, 5 * time.Minute,
	time.Hour, 6 * time.Hour, 24 * time.Hour, 7 * 24 * time.Hour,
}

const batchYear = 366 * 24 * time.Hour

// newBatchCase draws one stream: irregular times, duplicates, a hole of
// empty panes, arrival delayed by a random lag (a few readings by more
// than the window, so Add turns them away), values with a level from 1e-3
// to 1e6, noise from 1e-5 to 1e-1 of the level and a drift and curvature
// many standard errors large, and, with neg, a few readings y ≤ 0.
func newBatchCase(rng *rand.Rand, idx int) batchCase {
	var pane time.Duration
	var panes int
	switch idx {
	case 0: // shortest span: one minute of 1 s panes
		pane, panes = time.Second, 60
	case 1: // a year of 1 d panes
		pane, panes = 24*time.Hour, 366
	case 2: // a year of 7 d panes
		pane, panes = 7*24*time.Hour, 52
	default:
		pane = batchPaneChoices[rng.IntN(len(batchPaneChoices))]
		lo := max(3, int((time.Minute+pane-1)/pane))
		hi := min(600, int(batchYear/pane))
		panes = int(math.Round(batchLogUniform(rng, float64(lo), float64(hi))))
	}
	span := time.Duration(panes) * pane
	// A second window on the same ring (fewer panes) and, when the panes
	// are narrow enough, one on a ring of m times wider panes, so shared
	// rings and several rings are exercised too.
	specs := []rolling.WindowSpec{
		{Span: span, Pane: pane},
		{Span: time.Duration((panes+1)/2) * pane, Pane: pane},
	}
	if panes >= 8 {
		m := time.Duration(2 + rng.IntN(min(4, panes/4)-1))
		specs = append(specs, rolling.WindowSpec{Span: time.Duration(max(4, panes/int(m))) * pane * m, Pane: pane * m})
	}

	// Epochs: recent, straddling the Unix epoch (negative times), and
	// the 1960s.
	var t0 int64
	T := int64(float64(span) * (1.2 + 1.8*rng.Float64()))
	switch rng.IntN(6) {
	case 0:
		t0 = -T / 2
	case 1:
		t0 = time.Date(1965, 3, 1, 0, 0, 0, 0, time.UTC).UnixNano() + rng.Int64N(int64(batchYear))
	default:
		t0 = time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC).UnixNano() + rng.Int64N(int64(batchYear))
	}
	n := 400 + rng.IntN(3600)
	holeAt, holeLen := t0+rng.Int64N(T), int64(rng.Float64()*0.3*float64(span))
	ts := make([]int64, 0, n)
	for len(ts) < n {
		var t int64
		if len(ts) > 0 && rng.IntN(20) == 0 {
			t = ts[rng.IntN(len(ts))] // duplicate time
		} else {
			t = t0 + rng.Int64N(T)
		}
		if t >= holeAt && t < holeAt+holeLen {
			continue
		}
		ts = append(ts, t)
	}

	level := batchLogUniform(rng, 1e-3, 1e6)
	sigma := batchLogUniform(rng, 1e-5, 1e-1)
	sign := func() float64 { return float64(1 - 2*rng.IntN(2)) }
	// Drift and curvature across one span, relative to the level: 30 to
	// 1000 noise SDs, capped so the level stays above 0.3 in the window.
	// With at least 3 panes a window (4 for the wider panes) the change
	// within one pane stays below about 350 noise SDs: the regime where
	// the pane sums keep 1e-9 (see TestSolve_SteepTrendLowNoise).
	a1 := sign() * min(0.4, sigma*batchLogUniform(rng, 30, 1000))
	a2 := sign() * min(0.3, sigma*batchLogUniform(rng, 30, 1000))
	tEnd := t0 + T
	neg := rng.IntN(4) == 0
	type arrival struct {
		o  batchObs
		at int64
	}
	arr := make([]arrival, len(ts))
	for i, t := range ts {
		x := float64(t-tEnd) / float64(span)
		y := level * (1 + a1*x + a2*x*x + sigma*rng.NormFloat64())
		lag := rng.Int64N(2 * int64(pane))
		if rng.IntN(30) == 0 {
			lag = int64(rng.Float64() * 1.5 * float64(span)) // straggler
		}
		arr[i] = arrival{batchObs{t, y}, t + lag}
	}
	if neg {
		for range 1 + rng.IntN(5) {
			i := rng.IntN(len(arr))
			if rng.IntN(2) == 0 {
				arr[i].o.y = 0
			} else {
				arr[i].o.y = -level * rng.Float64()
			}
		}
	}
	slices.SortStableFunc(arr, func(a, b arrival) int { return cmp.Compare(a.at, b.at) })
	c := batchCase{specs: specs, arrivals: make([]batchObs, len(arr))}
	for i := range arr {
		c.arrivals[i] = arr[i].o
	}
	c.desc = fmt.Sprintf("pane %v × %d, n %d, level %.3g, noise %.2g, drift %.2g, curv %.2g, t0 %s, neg %v",
		pane, panes, n, level, sigma, a1, a2, time.Unix(0, t0).UTC().Format(time.RFC3339), neg)
	return c
}

func batchFloorDiv(a, b int64) int64 {
	q := a / b
	if a%b != 0 && a < 0 {
		q--
	}
	return q
}

// feedBatch feeds the stream to a sensor and returns, for each window,
// the readings the window must hold: those whose pane k satisfies
// k > newest − Span/Pane for the final newest pane. Along the way it
// checks Add's verdicts against the same rule applied at arrival time.
func feedBatch(t *testing.T, s *rolling.Sensor, specs []rolling.WindowSpec, arrivals []batchObs) [][]batchObs {
	t.Helper()
	newest := make([]int64, len(specs))
	late := make([]uint64, len(specs))
	started := false
	for _, o := range arrivals {
		allLate := started
		for i, sp := range specs {
			k := batchFloorDiv(o.t, int64(sp.Pane))
			if started && k <= newest[i]-int64(sp.Panes()) {
				late[i]++
			} else {
				allLate = false
			}
		}
		err := s.Add(rolling.Reading{UnixNano: o.t, Value: o.y})
		if allLate {
			if !errors.Is(err, rolling.ErrTooOld) {
				t.Fatalf("Add(%d) = %v, want ErrTooOld", o.t, err)
			}
			continue
		}
		if err != nil {
			t.Fatalf("Add(%d, %g) = %v, want nil", o.t, o.y, err)
		}
		for i, sp := range specs {
			k := batchFloorDiv(o.t, int64(sp.Pane))
			if !started || k > newest[i] {
				newest[i] = k
			}
		}
		started = true
	}
	out := make([][]batchObs, len(specs))
	for i, sp := range specs {
		if got := s.Late(i); got != late[i] {
			t.Errorf("window %d: Late = %d, want %d", i, got, late[i])
		}
		for _, o := range arrivals {
			if batchFloorDiv(o.t, int64(sp.Pane)) > newest[i]-int64(sp.Panes()) {
				out[i] = append(out[i], o)
			}
		}
	}
	return out
}

// TestSolve_MatchesBatchQR checks every model of randomised windows
// against an independent batch least-squares fit (gonum QR) over exactly
// the readings the window retains.
func TestSolve_MatchesBatchQR(t *testing.T) {
	seed := *batchSeed
	t.Logf("seed %d (replay with -seed %d)", seed, seed)
	rng := rand.New(rand.NewPCG(seed, 0x6472696674666974))
	const cases = 40
	var worst float64
	var weak, coefs int
	for c := range cases {
		bc := newBatchCase(rng, c)
		t.Run(strconv.Itoa(c), func(t *testing.T) {
			t.Log(bc.desc)
			s, err := rolling.NewSensor(bc.specs...)
			if err != nil {
				t.Fatal(err)
			}
			kept := feedBatch(t, s, bc.specs, bc.arrivals)
			for w, sp := range bc.specs {
				sol := s.Solve(w)
				for _, m := range rolling.Models {
					what := fmt.Sprintf("window %v/%v %v", sp.Span, sp.Pane, m)
					ref, err := batchFit(kept[w], m, int64(sp.Span))
					if err != nil {
						t.Fatalf("%s: reference over %d readings: %v", what, len(kept[w]), err)
					}
					worst = max(worst, compareBatch(t, what, sol.Fit(m), ref, batchTol))
					for j := range m.Coefs() {
						coefs++
						if math.Abs(ref.coef[j]) < 3*ref.se[j] {
							weak++
						}
					}
				}
				// The newest half of the window, against the batch fit
				// of the readings of its panes only; SolveJudged's Recent
				// holds the same line, and the newest quarter's.
				half := (sp.Panes() + 1) / 2
				var newest int64 = math.MinInt64
				for _, o := range kept[w] {
					newest = max(newest, batchFloorDiv(o.t, int64(sp.Pane)))
				}
				var recent []batchObs
				for _, o := range kept[w] {
					if batchFloorDiv(o.t, int64(sp.Pane)) > newest-int64(half) {
						recent = append(recent, o)
					}
				}
				rs := s.SolveRecent(w, half)
				if rs.Panes != half || rs.Window.Span != time.Duration(half)*sp.Pane {
					t.Errorf("window %v/%v: SolveRecent(%d) has %d panes, span %v", sp.Span, sp.Pane, half, rs.Panes, rs.Window.Span)
				}
				if ref, err := batchFit(recent, rolling.Line, int64(sp.Span)); err == nil {
					worst = max(worst, compareBatch(t, fmt.Sprintf("window %v/%v, newest %d panes, line", sp.Span, sp.Pane, half), &rs.Line, ref, batchTol))
				} else if rs.Line.OK() {
					t.Errorf("window %v/%v: newest %d panes hold %d readings, yet the line is %v", sp.Span, sp.Pane, half, len(recent), rs.Line.Err)
				}
				j := s.SolveJudged(w)
				if q := s.SolveRecent(w, (sp.Panes()+3)/4); j.Recent[1].Coef != q.Line.Coef || j.Recent[1].N != q.Line.N {
					t.Errorf("window %v/%v: SolveJudged's Recent[1] %v (n %d), want the newest quarter's line %v (n %d)", sp.Span, sp.Pane, j.Recent[1].Coef, j.Recent[1].N, q.Line.Coef, q.Line.N)
				}
				if j.Recent[0].Coef != rs.Line.Coef || j.Recent[0].N != rs.Line.N {
					t.Errorf("window %v/%v: SolveJudged's Recent[0] %v (n %d), want SolveRecent's line %v (n %d)", sp.Span, sp.Pane, j.Recent[0].Coef, j.Recent[0].N, rs.Line.Coef, rs.Line.N)
				}
			}
		})
	}
	// The drift and curvature are drawn many noise SDs large so that the
	// comparison is mostly of significant coefficients.
	t.Logf("largest relative error %.2g; %d of %d coefficients within 3 SE of zero", worst, weak, coefs)
}

// TestSolve_LongRun slides 10 million readings through a window of one
// hour of one-minute panes, a reading every 10 ms with up to 30 ms of
// jitter (so some arrive out of order), about 28 hours in all, and checks
// that the final fit equals the batch fit over the readings the window
// holds: the panes are dropped whole, so no error may accumulate. Only
// readings that can still be in the final window are kept.
//
// It takes about 1 s, and 5.5 s of CPU with -race (8 to 21 s of wall time
// on a loaded two-core machine), so -short skips it.
func TestSolve_LongRun(t *testing.T) {
	if testing.Short() {
		t.Skip("10 million readings; skipped with -short")
	}
	const (
		total = 10_000_000
		step  = int64(10 * time.Millisecond)
	)
	spec := rolling.WindowSpec{Span: time.Hour, Pane: time.Minute}
	seed := *batchSeed
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0x6c6f6e6772756e))
	s, err := rolling.NewSensor(spec)
	if err != nil {
		t.Fatal(err)
	}
	pane := int64(spec.Pane)
	panes := int64(spec.Panes())
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	// kept is a queue in arrival order: readings leave at the front once
	// their pane has left the window; the jitter is far below a pane, so
	// the few stragglers behind the front are dropped by the final filter.
	kept := make([]batchObs, 0, 1<<20)
	head := 0
	var newest int64 = math.MinInt64
	for i := range int64(total) {
		ti := t0 + i*step + rng.Int64N(3*step)
		h := float64(ti-t0) / 3.6e12 // hours since t0
		// ~1e3, drifting 0.2/h, bending −0.008/h², noise SD 0.01.
		y := 1000 + 0.2*h - 0.004*h*h + 0.01*rng.NormFloat64()
		if err := s.Add(rolling.Reading{UnixNano: ti, Value: y}); err != nil {
			t.Fatalf("Add #%d: %v", i, err)
		}
		if k := ti / pane; k > newest { // ti > 0: division is floor
			newest = k
			for head < len(kept) && kept[head].t/pane <= newest-panes {
				head++
			}
		}
		if len(kept) == cap(kept) {
			kept = append(kept[:0], kept[head:]...)
			head = 0
		}
		kept = append(kept, batchObs{ti, y})
	}
	kept = slices.DeleteFunc(kept[head:], func(o batchObs) bool { return batchFloorDiv(o.t, pane) <= newest-panes })
	sol := s.Solve(0)
	for _, m := range rolling.Models {
		ref, err := batchFit(kept, m, int64(spec.Span))
		if err != nil {
			t.Fatalf("%v: reference: %v", m, err)
		}
		f := sol.Fit(m)
		t.Logf("%v: n %d c %.12g se %.3g", m, f.N, f.Coef, f.SE)
		compareBatch(t, m.String(), f, ref, batchTol)
	}
}

// TestExpGrowth fits the exact exponential of
// ../testdata/reference/expgrowth.csv, y = 1000·2^(x/24) with x in months
// (see README.md there). A month is taken as the mean Gregorian month,
// 365.2425/12 days = 2 629 746 s exactly, so every reading time is an
// exact count of nanoseconds. The README gives: growth rate ln 2/24 per
// month, doubling time 24 months, residuals zero, R² = 1.
func TestExpGrowth(t *testing.T) {
	const month = 2_629_746 * time.Second // 365.2425 d / 12
	monthDays := float64(month) / batchNsPerDay
	f, err := os.Open(filepath.Join("..", "testdata", "reference", "expgrowth.csv"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if len(rows) < 2 || len(rows[0]) != 2 || rows[0][0] != "x" || rows[0][1] != "y" {
		t.Fatalf("expgrowth.csv: want a header x,y and data rows, got %d rows", len(rows))
	}
	// 49 monthly readings span 1461 days; 1470 days of 7-day panes hold them.
	s, err := rolling.NewSensor(rolling.WindowSpec{Span: 210 * 7 * 24 * time.Hour, Pane: 7 * 24 * time.Hour})
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	var lastY float64
	for _, r := range rows[1:] {
		x, err := strconv.Atoi(r[0])
		if err != nil {
			t.Fatalf("x %q: %v", r[0], err)
		}
		y, err := strconv.ParseFloat(r[1], 64)
		if err != nil {
			t.Fatalf("y %q: %v", r[1], err)
		}
		if err := s.Add(rolling.Reading{UnixNano: t0.Add(time.Duration(x) * month).UnixNano(), Value: y}); err != nil {
			t.Fatalf("Add x=%d: %v", x, err)
		}
		lastY = y
	}
	fit := s.Solve(0).Exp
	if fit.Err != nil || fit.N != len(rows)-1 {
		t.Fatalf("Exp fit: err %v, N %d, want nil, %d", fit.Err, fit.N, len(rows)-1)
	}
	const tol = 1e-12
	relErr := func(got, want float64) float64 { return math.Abs(got-want) / math.Abs(want) }
	// README: slope ln 2/24 per month, here per day.
	if want := math.Ln2 / (24 * monthDays); relErr(fit.Coef[1], want) > tol {
		t.Errorf("growth rate = %.17g /day, want %.17g (rel err %.2g)", fit.Coef[1], want, relErr(fit.Coef[1], want))
	}
	days, _, _, _, err := fit.Doubling()
	if err != nil {
		t.Fatalf("Doubling: %v", err)
	}
	if want := 24 * monthDays; relErr(days, want) > tol {
		t.Errorf("doubling time = %.17g days, want %.17g (24 months; rel err %.2g)", days, want, relErr(days, want))
	}
	// c0 is ln y at τ = 0, the newest reading (x = 48, y = 4000).
	if want := math.Log(lastY); relErr(fit.Coef[0], want) > tol {
		t.Errorf("c0 = %.17g, want ln(%g) = %.17g (rel err %.2g)", fit.Coef[0], lastY, want, relErr(fit.Coef[0], want))
	}
	if math.Abs(fit.R2-1) > tol {
		t.Errorf("R² = %.17g, want 1 within %g", fit.R2, tol)
	}
	t.Logf("c0 %.17g c1 %.17g doubling %.17g d R² %.17g residSD %.3g", fit.Coef[0], fit.Coef[1], days, fit.R2, fit.ResidSD)
}

// TestSolve_SteepTrendLowNoise checks the default one-day window of
// one-hour panes against the batch fit when the readings change much more
// within one pane than their noise: a level of 1000 rising 100 a day
// (about 4 per pane) with noise SDs from 1e-1 down to 1e-4, as from a
// high-resolution instrument watching a ramp.
//
// The residual pass sums each pane's squared residuals from the pane's
// raw moments, Σỹ² − 2Σq·ỹ + Σq²: every term is of the size of the
// squared change within the pane, Δ², while the result is n·σ². Rounding
// then leaves a relative error growing as ε·(Δ/σ)² in the RSS (ε = 2⁻⁵²;
// measured, about a tenth of that in ResidSD and the standard errors):
// 1e-9 is lost once Δ/σ passes about 10⁴. The batch QR reference, which
// sums explicit residuals, keeps about 1e-11 here. The coefficients are
// not affected. The test holds the engine to that documented precision
// model: agreement within max(1e-9, ε·(Δ/σ)²).
func TestSolve_SteepTrendLowNoise(t *testing.T) {
	spec := rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour}
	t0 := time.Date(2026, 5, 4, 0, 0, 0, 0, time.UTC).UnixNano()
	for _, sigma := range []float64{1e-1, 1e-2, 1e-3, 1e-4, 1e-5} {
		delta := 100.0 / 24 // change of the level within one pane
		t.Run(fmt.Sprintf("noise=%g/pane-change-over-noise=%.0f", sigma, delta/sigma), func(t *testing.T) {
			rng := rand.New(rand.NewPCG(7, math.Float64bits(sigma)))
			s, err := rolling.NewSensor(spec)
			if err != nil {
				t.Fatal(err)
			}
			var rs []batchObs
			for i := range int64(8640) { // every 10 s
				ti := t0 + i*int64(10*time.Second) + rng.Int64N(int64(10*time.Second))
				d := float64(ti-t0) / batchNsPerDay
				y := 1000 + 100*d - 20*d*d + sigma*rng.NormFloat64()
				if err := s.Add(rolling.Reading{UnixNano: ti, Value: y}); err != nil {
					t.Fatal(err)
				}
				rs = append(rs, batchObs{ti, y})
			}
			sol := s.Solve(0)
			ref, err := batchFit(rs, rolling.Parabola, int64(spec.Span))
			if err != nil {
				t.Fatal(err)
			}
			bound := 0x1p-52 * (delta / sigma) * (delta / sigma)
			worst := compareBatch(t, "parabola", &sol.Parabola, ref, max(batchTol, bound))
			t.Logf("largest relative error %.2g (ε·(Δ/σ)² = %.2g)", worst, bound)
		})
	}
}
