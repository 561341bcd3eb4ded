package alert_test

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"

	"driftfit/alert"
)

// z975 is the 97.5% quantile of the standard normal distribution: R
// qnorm(0.975) = 1.959963984540054 (from memory; TestOracleGate_AR1Inverse
// checks it against gonum).
const z975 = 1.959963984540054

// oracleGate is the gate of a rule that knows the noise: AR(1) of
// coefficient φ per reading and marginal variance σ² (white: φ = 0), so
// Cov(eᵢ, eⱼ) = σ²·φ^|i−j|. It fits each window's line by generalised
// least squares, which is the best linear unbiased estimator under that
// covariance, and knows the exact covariance of its coefficients,
//
//	Cov β̂ = (Xᵀ Σ⁻¹ X)⁻¹,   Σ⁻¹ = Q / (σ²(1 − φ²)),
//
// Q tridiagonal with Q₁₁ = Qₙₙ = 1, Qᵢᵢ = 1 + φ² inside, Qᵢ,ᵢ±₁ = −φ.
// Xᵀ Σ⁻¹ X and Xᵀ Σ⁻¹ y are sums over the Prais–Winsten transformed
// readings x*₁ = √(1 − φ²)·x₁, x*ₜ = xₜ − φ·xₜ₋₁ (and y* alike), whose
// errors are independent with the innovation variance σ²(1 − φ²)
// (Prais and Winsten 1954, Cowles Commission Discussion Paper 383;
// Hamilton 1994, Time Series Analysis, §8.3, from memory; the inverse is
// checked in TestOracleGate_AR1Inverse). With the variance known, the
// quantiles are normal, and the Scheffé band of a line is χ² with 2
// degrees of freedom.
//
// It judges what the tracker judges, with the same budget (the tracker's
// Alpha), Debounce 3 and gates: on every window with at least
// MinReadings readings and half its readings present, a slope breach is
// a 95% bound beyond the warning level with |c1| > q·SE, q the normal
// quantile at 1 − p/2, p = 3α; a lead-time breach is a τ in [0, 60 d]
// where the mean's 95% bound lies outside the band and the mean is
// √χ²₂(1 − p) standard errors from the as-left value. Its first raise of
// either kind is the delay a gate could reach if it knew the noise; a
// gate that estimates the noise from the window can only be slower.
type oracleGate struct {
	phi, s2e  float64
	step      float64 // days between readings
	tol, left float64
	slope     float64 // warning level, per day
	lead      float64 // warning level, days
	minN      int
	debounce  int
	spans     []int     // readings per window
	qSlope    []float64 // per window
	qLead     []float64 // per window
	streak    [][2]int  // per window: slope, lead time
	d, v      []float64 // ring of the newest readings
	head, n   int
}

func newOracleGate(tr *alert.Tracker, r alert.Rule, ns noiseSpec) *oracleGate {
	o := &oracleGate{
		phi: ns.phi, s2e: ptSigma * ptSigma * (1 - ns.phi*ns.phi),
		step: ns.step.Hours() / 24, tol: r.Tolerance, left: r.AsLeft,
		slope: r.Limits.Slope.Warning, lead: r.Limits.LeadTime.Warning.Hours() / 24, minN: r.MinReadings, debounce: r.Debounce,
	}
	biggest := 0
	for w, spec := range r.Windows {
		n := int(spec.Span / ns.step)
		biggest = max(biggest, n)
		o.spans = append(o.spans, n)
		a, _ := tr.Alpha(w, alert.Slope)
		p := float64(r.Debounce) * a
		o.qSlope = append(o.qSlope, max(distuv.UnitNormal.Quantile(1-p/2), z975))
		a, _ = tr.Alpha(w, alert.LeadTime)
		p = float64(r.Debounce) * a
		o.qLead = append(o.qLead, max(math.Sqrt(distuv.ChiSquared{K: 2}.Quantile(1-p)), z975))
	}
	o.streak = make([][2]int, len(r.Windows))
	o.d, o.v = make([]float64, biggest), make([]float64, biggest)
	return o
}

// add takes a reading d days after the start.
func (o *oracleGate) add(d, v float64) {
	o.d[o.head], o.v[o.head] = d, v
	o.head = (o.head + 1) % len(o.d)
	o.n = min(o.n+1, len(o.d))
}

// gls returns the GLS line (c0 at the newest reading, c1 per day) of the
// newest n readings and its covariance.
func (o *oracleGate) gls(n int) (c0, c1, v00, v01, v11 float64) {
	var s00, s01, s11, r0, r1 float64
	last := o.d[(o.head-1+len(o.d))%len(o.d)]
	var pt, pv float64
	for k := range n {
		j := (o.head - n + k + 2*len(o.d)) % len(o.d)
		tau, y := o.d[j]-last, o.v[j]
		var x0, x1, ys float64
		if k == 0 {
			w := math.Sqrt(1 - o.phi*o.phi)
			x0, x1, ys = w, w*tau, w*y
		} else {
			x0, x1, ys = 1-o.phi, tau-o.phi*pt, y-o.phi*pv
		}
		s00 += x0 * x0
		s01 += x0 * x1
		s11 += x1 * x1
		r0 += x0 * ys
		r1 += x1 * ys
		pt, pv = tau, y
	}
	det := s00*s11 - s01*s01
	i00, i01, i11 := s11/det, -s01/det, s00/det
	c0, c1 = i00*r0+i01*r1, i01*r0+i11*r1
	return c0, c1, o.s2e * i00, o.s2e * i01, o.s2e * i11
}

// judge evaluates window w at a pane close, before the reading of that
// time is added, and reports whether it raised.
func (o *oracleGate) judge(w int) bool {
	n := min(o.n, o.spans[w])
	st := &o.streak[w]
	if n < o.minN || 2*n < o.spans[w] {
		*st = [2]int{}
		return false
	}
	c0, c1, v00, v01, v11 := o.gls(n)
	se1 := math.Sqrt(v11)
	var slope, lead bool
	if b := max(c1-z975*se1, -c1-z975*se1, 0); b > o.slope && math.Abs(c1) > o.qSlope[w]*se1 {
		slope = true
	}
	const leadSteps = 64 // the tracker's grid
	for k := 0; k <= leadSteps; k++ {
		tau := o.lead * float64(k) / leadSteps
		m := c0 + c1*tau
		sd := math.Sqrt(max(v00+2*tau*v01+tau*tau*v11, 0))
		if dist := math.Abs(m - o.left); dist-z975*sd >= o.tol && dist >= o.qLead[w]*sd {
			lead = true
			break
		}
	}
	raised := false
	for i, b := range [2]bool{slope, lead} {
		if !b {
			st[i] = 0
			continue
		}
		st[i]++
		if st[i] == o.debounce {
			raised = true
		}
	}
	return raised
}

// TestOracleGate_AR1Inverse checks the oracle's formulas: Σ·Q/(σ²(1 − φ²))
// is the identity for Σᵢⱼ = σ²·φ^|i−j| and Q the tridiagonal matrix of
// oracleGate's comment (n = 7, φ = 0.7, σ² = 2.5, exact to rounding);
// the covariance gls forms from the Prais–Winsten sums equals
// (Xᵀ Σ⁻¹ X)⁻¹ formed with Q directly; and z975 is gonum's normal
// quantile.
func TestOracleGate_AR1Inverse(t *testing.T) {
	const n, phi, s2 = 7, 0.7, 2.5
	var sigma, q [n][n]float64
	for i := range n {
		for j := range n {
			sigma[i][j] = s2 * math.Pow(phi, math.Abs(float64(i-j)))
		}
		q[i][i] = 1 + phi*phi
		if i > 0 {
			q[i][i-1], q[i-1][i] = -phi, -phi
		}
	}
	q[0][0], q[n-1][n-1] = 1, 1
	for i := range n {
		for j := range n {
			var v float64
			for k := range n {
				v += sigma[i][k] * q[k][j]
			}
			v /= s2 * (1 - phi*phi)
			want := 0.0
			if i == j {
				want = 1
			}
			if math.Abs(v-want) > 1e-12 {
				t.Fatalf("(Σ·Q)/(σ²(1−φ²))[%d][%d] = %v, want %v", i, j, v, want)
			}
		}
	}
	// gls on readings at τ = 0..n−1 days against (Xᵀ Σ⁻¹ X)⁻¹ from Q.
	o := &oracleGate{phi: phi, s2e: s2 * (1 - phi*phi), d: make([]float64, n), v: make([]float64, n)}
	for i := range n {
		o.add(float64(i), float64(i*i%5))
	}
	_, _, v00, v01, v11 := o.gls(n)
	var a00, a01, a11 float64 // Xᵀ Q X with x = (1, τ − τ_last)
	for i := range n {
		for j := range n {
			ti, tj := float64(i-(n-1)), float64(j-(n-1))
			a00 += q[i][j]
			a01 += q[i][j] * tj
			a11 += ti * q[i][j] * tj
		}
	}
	k := 1 / (s2 * (1 - phi*phi))
	a00, a01, a11 = k*a00, k*a01, k*a11
	det := a00*a11 - a01*a01
	for _, c := range []struct {
		name      string
		got, want float64
	}{{"Var c0", v00, a11 / det}, {"Cov", v01, -a01 / det}, {"Var c1", v11, a00 / det}} {
		if math.Abs(c.got-c.want) > 1e-12*math.Abs(c.want) {
			t.Errorf("gls %s = %v, want %v from Q", c.name, c.got, c.want)
		}
	}
	if z := distuv.UnitNormal.Quantile(0.975); math.Abs(z-z975) > 1e-14 {
		t.Errorf("z975 = %v, gonum %v", z975, z)
	}
}
