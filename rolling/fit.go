package rolling

import (
	"math"
	"time"
)

const nanosPerDay = 86400e9

// Fit is the least-squares fit of one model over one window.
//
// Time enters as τ = (t − Last) in days, so Coef[0] is the fitted value at
// the newest reading, Coef[1] a rate per day and Coef[2] a curvature per
// day². For Exp the fitted quantity is ln y.
//
// When Err is not nil the fit is not usable and every number is zero,
// except for ErrConstant (see there) and N, First and Last, which still
// describe the window.
type Fit struct {
	Model Model
	Err   error

	N        int       // readings used
	Excluded int       // Exp only: readings left out because y ≤ 0
	First    time.Time // first reading time in the window
	Last     time.Time // newest reading time in the window: τ = 0

	Coef [3]float64    // c0, c1 (per day), c2 (per day², Parabola only)
	SE   [3]float64    // standard errors of Coef
	CI   [3][2]float64 // 95% confidence intervals of Coef (low, high)
	Cov  [3][3]float64 // covariance matrix of Coef

	ResidSD float64 // residual standard deviation, √(RSS/(N−p)), in y units (ln y for Exp)
	R2      float64 // coefficient of determination, 1 − RSS/Σ(y−ȳ)²
	DF      int     // residual degrees of freedom N − p
	TCrit   float64 // 97.5% quantile of Student's t with DF degrees of freedom

	// Cond is the 2-norm condition number of the normal matrix in the
	// scaled time z ∈ [−1, 1] spanning the window's readings: near 1 for
	// readings spread evenly, large when they crowd into a small part of
	// the window. PosDef says the normal matrix is positive definite, so
	// the coefficients are the unique minimum of the squared error.
	Cond   float64
	PosDef bool

	// Serial correlation of the residuals and the standard errors that
	// allow for it (see SetSerial). R1 is the lag-1 autocorrelation of
	// the residuals over Pairs pairs of consecutive readings in time
	// order (for Exp: the parabola's, see SetSerial); NEff the effective
	// count of independent readings N(1 − r)/(1 + r), r = max(R1, 0);
	// Inflation = √((N − p)/(NEff − p)) the factor on SE; SEAdj =
	// Inflation·SE and CIAdj = Coef ± TCritAdj·SEAdj, TCritAdj the 97.5%
	// Student's t quantile with ⌊NEff⌋ − p degrees of freedom. When
	// SerialErr is not nil (ErrSerialUnknown) the correction could not be
	// estimated and NEff, Inflation, TCritAdj, SEAdj and CIAdj are zero.
	R1        float64
	Pairs     int
	NEff      float64
	Inflation float64
	TCritAdj  float64
	SEAdj     [3]float64
	CIAdj     [3][2]float64
	SerialErr error
}

// OK reports whether the fit can be used: no error, ErrConstant or
// ErrUnresolved.
func (f *Fit) OK() bool { return f.Err == nil || f.Err == ErrConstant || f.Err == ErrUnresolved }

// Solution holds the three fits of one window at one moment.
type Solution struct {
	Window   WindowSpec
	Panes    int // panes in the window
	Filled   int // panes holding at least one reading
	N        int
	First    time.Time
	Last     time.Time
	Line     Fit
	Parabola Fit
	Exp      Fit
	// Recent are the Lines over the newest half and the newest quarter
	// of the window's panes, serially corrected as the others; filled by
	// SolveJudged only (else zero values, which are not PosDef). A line
	// over a window in which a drift began part-way is bent by the flat
	// part; the newest part of the window less so.
	Recent [2]Fit
}

// Coverage returns the fraction of the window's panes that hold readings.
func (s *Solution) Coverage() float64 { return float64(s.Filled) / float64(s.Panes) }

// Fit returns the fit of model m.
func (s *Solution) Fit(m Model) *Fit {
	switch m {
	case Line:
		return &s.Line
	case Parabola:
		return &s.Parabola
	case Exp:
		return &s.Exp
	}
	return nil
}

// normal holds the normal equations G·β = r of a fit in scaled time z.
type normal struct {
	g   [3][3]float64
	r   [3]float64
	n   float64
	p   int
	rss float64 // residual sum of squares, filled by the second pass
	css float64 // Σ(y − ȳ)², filled by the second pass
	det float64 // det G, from the Cholesky factor
	// bound, times ε, bounds the rounding error of rss: each pane's sum
	// Σỹ² − 2Σq·ỹ + Σq² of about ten products, from sums of m terms
	// each, errs by at most about (m + 10)·ε·(Σỹ² + Σq²) (Higham,
	// Accuracy and Stability of Numerical Algorithms, 2nd ed., §3.1 and
	// §4.2: recursive summation errs by (m − 1)·u·Σ|xᵢ|), Σ|q·ỹ| being
	// at most (Σỹ² + Σq²)/2. It is formed from window totals, with m the
	// largest pane count.
	bound float64
	// varied: some value differs from another (the data are not
	// constant), told from the pane sums.
	varied bool
	// condOf, when positive, is the condition number of this very matrix,
	// already computed for another fit (the exp fit shares the line's).
	condOf float64
}

// Solve fits the three models over window i.
//
// The window's readings are put on a scaled time z = (t − tc)/h, with tc
// and h the midpoint and half-width of their time range, so the normal
// matrix is well conditioned whatever the epoch and span. A first pass
// over the panes shifts each pane's sums exactly onto z and onto common
// value anchors and solves the normal equations by Cholesky factorisation.
// A second pass sums the squared residuals pane by pane in the pane's own
// coordinates, Σ(ỹ − q(u))² with q the fitted curve seen from that pane, so
// the residual sum of squares never comes from subtracting two window
// totals: near-perfect fits (R² → 1) keep their precision. What remains is
// the cancellation inside one pane: with a change Δ across a pane and
// noise σ, the residual SD and standard errors carry a relative error of
// about 0.1·ε·(Δ/σ)², ε = 2⁻⁵²; below 1e-9 while Δ/σ < 10⁴. Coefficients
// are not affected.
func (s *Sensor) Solve(i int) Solution { return s.solve(&s.wins[i]) }

// SolveRecent is Solve over the newest panes panes of window i only
// (clamped to 1 … the window's panes): a window of the same pane width
// and a shorter span, as if configured so.
func (s *Sensor) SolveRecent(i, panes int) Solution {
	w := s.wins[i]
	k := min(max(int64(panes), 1), w.panes)
	w.panes, w.spec.Span = k, time.Duration(k)*w.spec.Pane
	return s.solve(&w)
}

func (s *Sensor) solve(w *window) Solution {
	rg := &s.rings[w.ring]
	sol := Solution{Window: w.spec, Panes: int(w.panes)}
	sol.Line.Model, sol.Parabola.Model, sol.Exp.Model = Line, Parabola, Exp
	if !rg.start {
		sol.Line.Err, sol.Parabola.Err, sol.Exp.Err = ErrNotEnoughData, ErrNotEnoughData, ErrNotEnoughData
		return sol
	}

	// Range pass: time range, counts, and the value anchors of the
	// newest pane (Y) and newest pane with positive readings (L).
	oldest := rg.newest - w.panes + 1
	var n, npos int
	tfirst, tlast := int64(math.MaxInt64), int64(math.MinInt64)
	var anchorY, anchorL float64
	haveL := false
	P := len(rg.panes)
	first := rg.slot(oldest) // slot of the oldest pane; slots then run on with wrap-around
	for k, j := rg.newest, rg.slot(rg.newest); k >= oldest; k, j = k-1, j-1 {
		if j < 0 {
			j += P
		}
		p := &rg.panes[j]
		if p.n == 0 {
			continue
		}
		if n == 0 {
			anchorY = p.y0
		}
		if !haveL && p.npos > 0 {
			anchorL, haveL = p.l0, true
		}
		sol.Filled++
		n += int(p.n)
		npos += int(p.npos)
		tfirst = min(tfirst, p.tmin)
		tlast = max(tlast, p.tmax)
	}
	sol.N = n
	sol.First, sol.Last = time.Unix(0, tfirst), time.Unix(0, tlast)
	for _, f := range []*Fit{&sol.Line, &sol.Parabola, &sol.Exp} {
		f.N, f.First, f.Last = n, sol.First, sol.Last
	}
	sol.Exp.N, sol.Exp.Excluded = npos, n-npos

	if tfirst == tlast {
		for _, f := range []*Fit{&sol.Line, &sol.Parabola, &sol.Exp} {
			f.Err = ErrNoTimeSpread
			if f.N <= f.Model.Coefs() {
				f.Err = ErrNotEnoughData
			}
		}
		return sol
	}

	// z = a_k + bz·u for pane k, with a_k = (2(tmin_k − tfirst) − span)/span
	// and bz = 2w/span: the integer parts are exact, only the final
	// scaling rounds, the same way in both passes.
	span := tlast - tfirst
	fspan := float64(span)
	bz := 2 * float64(rg.width) / fspan
	bz2 := bz * bz
	bz3, bz4 := bz2*bz, bz2*bz2

	var lin, par, ex normal
	par.p, lin.p, ex.p = 3, 2, 2
	// While no pane mixes readings ≤ 0 with positive ones, the exp fit
	// uses every reading and shares the line's normal matrix.
	mixed := false
	invSpan := 1 / fspan
	var vbits, ebits uint64
	var sumSyy, sumSll float64
	var maxN uint32
	for k, j := oldest, first; k <= rg.newest; k, j = k+1, j+1 {
		if j == P {
			j = 0
		}
		p := &rg.panes[j]
		if p.n == 0 {
			continue
		}
		a := float64(2*(p.tmin-tfirst)-span) * invSpan
		a2 := a * a
		pn := float64(p.n)
		// Σzʲ = Σₘ C(j,m)·a^(j−m)·(bz^m·Σuᵐ), in Horner form.
		t1, t2, t3, t4 := bz*p.su, bz2*p.su2, bz3*p.su3, bz4*p.su4
		m1 := pn*a + t1
		m2 := a*(pn*a+2*t1) + t2
		m3 := a*(a*(pn*a+3*t1)+3*t2) + t3
		m4 := a*(a*(a*(pn*a+4*t1)+6*t2)+4*t3) + t4
		d := p.y0 - anchorY
		// Some value differs from the anchor: ỹ or the pane's offset is
		// not zero (sign bits shifted out).
		vbits |= (math.Float64bits(p.syy) | math.Float64bits(p.sy) | math.Float64bits(d)) << 1
		sumSyy += p.syy
		maxN = max(maxN, p.n)
		par.n += pn
		par.g[0][1] += m1
		par.g[0][2] += m2
		par.g[1][2] += m3
		par.g[2][2] += m4
		par.r[0] += p.sy + pn*d
		ty1 := bz * p.suy
		par.r[1] += a*p.sy + ty1 + d*m1
		par.r[2] += a*(a*p.sy+2*ty1) + bz2*p.su2y + d*m2
		if p.npos > 0 {
			dl := p.l0 - anchorL
			qn, q1, q2 := pn, m1, m2
			if p.mixed() {
				// Only the positive readings enter the exp fit.
				mixed = true
				sup, su2p := rg.posMoments(j)
				qn = float64(p.npos)
				q1 = qn*a + bz*sup
				q2 = qn*a2 + 2*a*bz*sup + bz2*su2p
			}
			ebits |= (math.Float64bits(p.sll) | math.Float64bits(p.sl) | math.Float64bits(dl)) << 1
			sumSll += p.sll
			ex.n += qn
			ex.g[0][1] += q1
			ex.g[1][1] += q2
			ex.r[0] += p.sl + float64(p.npos)*dl
			ex.r[1] += a*p.sl + bz*p.sul + dl*q1
		}
	}
	par.g[0][0] = par.n
	par.g[1][1] = par.g[0][2]
	lin.n = par.n
	lin.g[0][0], lin.g[0][1], lin.g[1][1] = par.n, par.g[0][1], par.g[0][2]
	lin.r[0], lin.r[1] = par.r[0], par.r[1]
	var bl, bp, be [3]float64
	var il, ip, ie [3][3]float64
	sol.Line.PosDef = lin.solve(&bl, &il)
	sol.Parabola.PosDef = par.solve(&bp, &ip)
	switch {
	case npos == 0:
	case mixed:
		ex.g[0][0] = ex.n
		sol.Exp.PosDef = ex.solve(&be, &ie)
	default:
		// Every reading is positive: the line's matrix, to the bit, so
		// its factorisation serves.
		ex.g, ex.det = lin.g, lin.det
		if sol.Exp.PosDef = sol.Line.PosDef; sol.Exp.PosDef {
			ie = il
			be[0] = il[0][0]*ex.r[0] + il[0][1]*ex.r[1]
			be[1] = il[1][0]*ex.r[0] + il[1][1]*ex.r[1]
		}
	}

	// Residual pass, pane by pane in pane coordinates, with the rounding
	// bound of each residual sum and the lag-1 products of the residuals
	// (see serialSums).
	ybar := par.r[0] / par.n
	var lbar float64
	if ex.n > 0 {
		lbar = ex.r[0] / ex.n
	}
	var sl, sp serialSums
	// Ordered panes' lag sums for the line, whose slope in pane units q1
	// is the same in every pane: Σ(Δe)² = Σd² − 2q1·ΣdΔu + q1²·ΣΔu².
	var lagDD, lagDDU, lagDU2 float64
	pairs, chained := 0, 0
	for k, j := oldest, first; k <= rg.newest; k, j = k+1, j+1 {
		if j == P {
			j = 0
		}
		p := &rg.panes[j]
		if p.n == 0 {
			continue
		}
		a := float64(2*(p.tmin-tfirst)-span) * invSpan
		pn := float64(p.n)
		d := p.y0 - anchorY
		c := d - ybar
		css := p.syy + 2*c*p.sy + pn*c*c
		par.css += css
		q0, q1 := bl[0]+bl[1]*a-d, bz*bl[1]
		rl := paneRSSLine(p, q0, q1)
		lin.rss += rl
		r0, r1, r2 := bp[0]+bp[1]*a+bp[2]*a*a-d, bz*(bp[1]+2*bp[2]*a), bz2*bp[2]
		rp := paneRSS(p, r0, r1, r2)
		par.rss += rp
		if p.ordered() {
			u1 := float64(p.tmax-p.tmin) * rg.invW
			dy := p.ylast - p.y0
			lagDD += p.sdd
			lagDDU += p.sddu
			lagDU2 += p.sdu2
			pairs += int(p.n) - 1 + chained
			chained = 1
			sl.add(rl, -q0, dy-(q0+q1*u1), 0)
			ap := r1 + r2*u1 // the parabola's slope across the pane
			sp.add(rp, -r0, dy-(r0+u1*(r1+r2*u1)), p.sdd-ap*(2*p.sddu-ap*p.sdu2))
		} else {
			chained = 0
			sl.gap()
			sp.gap()
		}
		if p.npos > 0 {
			sup, su2p := rg.posMoments(j)
			qn := float64(p.npos)
			dl := p.l0 - anchorL
			c := dl - lbar
			ex.css += p.sll + 2*c*p.sl + qn*c*c
			q0, q1 := be[0]+be[1]*a-dl, bz*be[1]
			ex.rss += p.sll - 2*(q0*p.sl+q1*p.sul) + q0*q0*qn + 2*q0*q1*sup + q1*q1*su2p
		}
	}
	lin.css, ex.varied = par.css, ebits != 0
	lin.varied, par.varied = vbits != 0, vbits != 0
	// Rounding bounds (see normal.bound): with Σq² ≤ 2Σỹ² + 2·RSS_pane,
	// Σ(Σỹ² + Σq²) ≤ 3Σỹ² + 2·RSS over the window.
	bw := float64(maxN) + 10
	lin.bound = bw * (3*sumSyy + 2*max(lin.rss, 0))
	par.bound = bw * (3*sumSyy + 2*max(par.rss, 0))
	ex.bound = bw * (3*sumSll + 2*max(ex.rss, 0))

	// τ in days: z = 1 + g·τ at the newest reading, since tlast maps to z = 1.
	g := 2 * nanosPerDay / fspan
	lin.finish(&sol.Line, bl, il, g, anchorY)
	par.finish(&sol.Parabola, bp, ip, g, anchorY)
	ql := bz * bl[1]
	sl.prod -= 0.5 * (lagDD - ql*(2*lagDDU-ql*lagDU2))
	sol.Line.SetSerial(sl.r1(lin.rss, sol.Line.N, pairs), pairs)
	r1p := sp.r1(par.rss, sol.Parabola.N, pairs)
	sol.Parabola.SetSerial(r1p, pairs)
	if npos == 0 {
		sol.Exp.Err = ErrNotEnoughData
	} else {
		if !mixed {
			ex.condOf = sol.Line.Cond
		}
		ex.finish(&sol.Exp, be, ie, g, anchorL)
	}
	// The exp fit borrows the parabola's estimate (see SetSerial), or the
	// line's when the parabola has none (readings at two instants).
	if sol.Parabola.OK() {
		sol.Exp.SetSerial(r1p, pairs)
	} else {
		sol.Exp.SetSerial(sol.Line.R1, sol.Line.Pairs)
	}
	return sol
}

// serialSums collects, pane by pane in time order, the lag-1 products of
// a fit's residuals e over consecutive readings in time order: Σe_i·e_{i−1}
// and the count of pairs.
//
// Within an ordered pane of m readings, with eF and eL the residuals of
// its first and last reading, Σ_pairs (e_i − e_{i−1})² = Σe² + Σe² − 2Σe_i·e_{i−1}
// where the first Σe² leaves out eF² and the second eL², so
//
//	Σ e_i·e_{i−1} = (2·RSS_pane − eF² − eL² − Σ(Δe)²)/2,
//
// and Δe = d − Δq with d the change of the reading and Δq that of the
// fitted curve, Δq = A·Δu for a line (A its slope in pane units), giving
// Σ(Δe)² = Σd² − 2A·Σd·Δu + A²·ΣΔu² from the pane's sums. For the
// parabola A is its slope at the middle of the pane's readings; the
// change of slope within one pane is left out of Δq, which for the
// curvatures a window resolves changes Σ(Δe)² by far less than its
// noise. Between consecutive ordered panes (also across empty ones) the
// pair (last of one, first of the next) is added as eL·eF. An unordered
// pane contributes no pair and breaks the chain.
type serialSums struct {
	prod  float64
	prevE float64 // residual of the last reading of the previous ordered pane; 0 after a gap
}

// add records an ordered pane with residual sum of squares rss, first
// and last residual ef, el, and Σ(Δe)² dd (for the line, 0: its Σ(Δe)²
// is subtracted once from window totals). The bridge to the previous
// pane is added without a branch: prevE is 0 after a gap. The pair count,
// the same for every fit, is kept by Solve: m − 1 within a pane of m
// readings, plus one for each bridge.
func (s *serialSums) add(rss, ef, el, dd float64) {
	s.prod += rss - 0.5*(ef*ef+el*el+dd) + s.prevE*ef
	s.prevE = el
}

// gap records an unordered pane.
func (s *serialSums) gap() { s.prevE = 0 }

// r1 returns the lag-1 autocorrelation estimate (Σe_i·e_{i−1}/pairs) /
// (RSS/n): the mean lag product over the mean square.
func (s *serialSums) r1(rss float64, n, pairs int) float64 {
	if pairs == 0 || !(rss > 0) {
		return 0
	}
	return s.prod / float64(pairs) / (rss / float64(n))
}

// paneRSS returns Σ(ỹ − q(u))² over a pane for q(u) = q0 + q1·u + q2·u².
func paneRSS(p *pane, q0, q1, q2 float64) float64 {
	return p.syy - 2*(q0*p.sy+q1*p.suy+q2*p.su2y) +
		q0*q0*float64(p.n) + 2*q0*q1*p.su + (q1*q1+2*q0*q2)*p.su2 + 2*q1*q2*p.su3 + q2*q2*p.su4
}

// paneRSSLine is paneRSS with q2 = 0.
func paneRSSLine(p *pane, q0, q1 float64) float64 {
	return p.syy - 2*(q0*p.sy+q1*p.suy) + q0*q0*float64(p.n) + 2*q0*q1*p.su + q1*q1*p.su2
}

// pdTol is the smallest Cholesky pivot, relative to its diagonal entry,
// taken as positive: the sums carry rounding of a few ulps times the
// count of panes, so a smaller pivot cannot be told apart from zero.
const pdTol = 1e-12

// solve factors the symmetric matrix (upper triangle in ne.g) by Cholesky,
// G = L·Lᵀ, and fills beta = G⁻¹·r and inv = G⁻¹. It reports false,
// leaving beta and inv zero, when G is not positive definite.
func (ne *normal) solve(beta *[3]float64, inv *[3][3]float64) bool {
	p := ne.p
	if p == 2 {
		// The 2×2 case written out: pivot g00, then the Schur complement.
		g00, g01, g11 := ne.g[0][0], ne.g[0][1], ne.g[1][1]
		if !(g00 > 0) {
			return false
		}
		d := g11 - g01*g01/g00
		if !(d > pdTol*g11) {
			return false
		}
		ne.det = g00 * d
		inv[0][0], inv[0][1], inv[1][1] = g11/ne.det, -g01/ne.det, 1/d
		inv[1][0] = inv[0][1]
		beta[0] = inv[0][0]*ne.r[0] + inv[0][1]*ne.r[1]
		beta[1] = inv[1][0]*ne.r[0] + inv[1][1]*ne.r[1]
		return true
	}
	var l [3][3]float64
	for c := 0; c < p; c++ {
		d := ne.g[c][c]
		for k := 0; k < c; k++ {
			d -= l[c][k] * l[c][k]
		}
		if !(d > pdTol*ne.g[c][c]) {
			return false
		}
		l[c][c] = math.Sqrt(d)
		for r := c + 1; r < p; r++ {
			v := ne.g[c][r]
			for k := 0; k < c; k++ {
				v -= l[r][k] * l[c][k]
			}
			l[r][c] = v / l[c][c]
		}
	}
	// Inverse of L (lower triangular), then G⁻¹ = L⁻ᵀ·L⁻¹.
	var li [3][3]float64
	for c := 0; c < p; c++ {
		li[c][c] = 1 / l[c][c]
		for r := c + 1; r < p; r++ {
			var v float64
			for k := c; k < r; k++ {
				v -= l[r][k] * li[k][c]
			}
			li[r][c] = v / l[r][r]
		}
	}
	for r := 0; r < p; r++ {
		for c := 0; c < p; c++ {
			var v float64
			for k := max(r, c); k < p; k++ {
				v += li[k][r] * li[k][c]
			}
			inv[r][c] = v
		}
	}
	for r := 0; r < p; r++ {
		var v float64
		for c := 0; c < p; c++ {
			v += inv[r][c] * ne.r[c]
		}
		beta[r] = v
	}
	det := 1.0
	for c := 0; c < p; c++ {
		det *= l[c][c] * l[c][c]
	}
	ne.det = det
	return true
}

// finish turns the solution in z into the reported fit in τ days.
// With z = 1 + g·τ, p(z) = Σβⱼzʲ becomes c = T·β with
// T = [[1, 1, 1], [0, g, 2g], [0, 0, g²]] (cut to the model's size), and
// the covariance Tᵀ-transforms with it. anchor is added back to c0.
func (ne *normal) finish(f *Fit, beta [3]float64, inv [3][3]float64, g, anchor float64) {
	p := ne.p
	if f.N <= p {
		f.Err = ErrNotEnoughData
		return
	}
	if !f.PosDef {
		f.Err = ErrSingular
		return
	}
	f.DF = f.N - p
	rss := ne.rss
	unresolved := false
	if bound := ne.bound * 0x1p-52; rss < bound {
		rss, unresolved = bound, true
	}
	s2 := rss / float64(f.DF)
	if p == 2 {
		// T = [[1, 1], [0, g]]: written out, the hot case of two fits.
		i00, i01, i11 := inv[0][0], inv[0][1], inv[1][1]
		f.Coef[0], f.Coef[1] = beta[0]+beta[1], g*beta[1]
		f.Cov[0][0] = s2 * (i00 + 2*i01 + i11)
		f.Cov[0][1] = s2 * g * (i01 + i11)
		f.Cov[1][0] = f.Cov[0][1]
		f.Cov[1][1] = s2 * g * g * i11
	} else {
		t := [3][3]float64{{1, 1, 1}, {0, g, 2 * g}, {0, 0, g * g}}
		var ti [3][3]float64 // T·G⁻¹
		for r := range 3 {
			for c := range 3 {
				ti[r][c] = t[r][0]*inv[0][c] + t[r][1]*inv[1][c] + t[r][2]*inv[2][c]
			}
		}
		for r := range 3 {
			f.Coef[r] = t[r][0]*beta[0] + t[r][1]*beta[1] + t[r][2]*beta[2]
			for c := range 3 {
				f.Cov[r][c] = s2 * (ti[r][0]*t[c][0] + ti[r][1]*t[c][1] + ti[r][2]*t[c][2])
			}
		}
	}
	f.Coef[0] += anchor
	f.TCrit = t975(f.DF)
	for r := 0; r < p; r++ {
		f.SE[r] = math.Sqrt(max(f.Cov[r][r], 0))
		f.CI[r] = [2]float64{f.Coef[r] - f.TCrit*f.SE[r], f.Coef[r] + f.TCrit*f.SE[r]}
	}
	f.ResidSD = math.Sqrt(s2)
	if f.Cond = ne.condOf; !(f.Cond > 0) {
		f.Cond = ne.cond()
	}
	switch {
	case !ne.varied:
		f.Err = ErrConstant
		f.SE, f.Cov, f.ResidSD = [3]float64{}, [3][3]float64{}, 0
		for r := 0; r < p; r++ {
			f.CI[r] = [2]float64{f.Coef[r], f.Coef[r]}
		}
	case !(ne.css >= f.scaleFloor()):
		// Squared differences among the subnormals: no digit to trust.
		f.Err = ErrNumeric
	default:
		f.R2 = 1 - rss/ne.css
		if unresolved {
			f.Err = ErrUnresolved
		}
	}
	if f.Err == ErrNumeric || !f.finite() {
		*f = Fit{Model: f.Model, Err: ErrNumeric, N: f.N, Excluded: f.Excluded, First: f.First, Last: f.Last}
	}
}

// scaleFloor is the least Σ(y − ȳ)² whose squares keep full precision:
// N mean squares of 2⁻⁹⁶⁸, deviations of about 1e-146 or more. Below it
// the squared differences approach the subnormal range (below 2⁻¹⁰²²).
func (f *Fit) scaleFloor() float64 { return float64(f.N) * 0x1p-968 }

// finite reports whether every number of the fit is finite.
func (f *Fit) finite() bool {
	sum := f.ResidSD + f.R2 + f.Cond + f.TCrit
	for r := range 3 {
		sum += f.Coef[r] + f.SE[r] + f.CI[r][0] + f.CI[r][1] + f.Cov[r][0] + f.Cov[r][1] + f.Cov[r][2]
	}
	// A sum of finite numbers can overflow, so check the terms when the
	// sum is not finite.
	if !math.IsNaN(sum) && !math.IsInf(sum, 0) {
		return true
	}
	vals := []float64{f.ResidSD, f.R2, f.Cond, f.TCrit}
	for r := range 3 {
		vals = append(vals, f.Coef[r], f.SE[r], f.CI[r][0], f.CI[r][1], f.Cov[r][0], f.Cov[r][1], f.Cov[r][2])
	}
	for _, v := range vals {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return false
		}
	}
	return true
}

// cond returns the 2-norm condition number λmax/λmin of the symmetric
// positive definite normal matrix. λmax is the largest root of the
// characteristic polynomial, found by Newton's method from Gershgorin's
// upper bound (the cubic is convex and rising there, so the iterates fall
// monotonically onto the root; the Frobenius norm bounds it from above
// as well); the other two eigenvalues then have a
// known sum and product, and λmin comes from the determinant, which the
// Cholesky factor gives accurately even for a nearly singular matrix.
func (ne *normal) cond() float64 {
	g := &ne.g
	if ne.p == 2 {
		m := (g[0][0] + g[1][1]) / 2
		d := math.Hypot((g[0][0]-g[1][1])/2, g[0][1])
		hi := m + d
		return hi * hi / ne.det
	}
	a00, a11, a22 := g[0][0], g[1][1], g[2][2]
	a01, a02, a12 := g[0][1], g[0][2], g[1][2]
	c2 := a00 + a11 + a22
	c1 := a00*a11 - a01*a01 + a00*a22 - a02*a02 + a11*a22 - a12*a12
	c0 := ne.det
	l := max(a00+math.Abs(a01)+math.Abs(a02), math.Abs(a01)+a11+math.Abs(a12), math.Abs(a02)+math.Abs(a12)+a22)
	// The Frobenius norm is an upper bound too, and for normal matrices in
	// z ∈ [−1, 1], whose largest eigenvalue dominates, the closer one
	// (about 5% above it against 20% for Gershgorin's): fewer steps.
	l = min(l, math.Sqrt(a00*a00+a11*a11+a22*a22+2*(a01*a01+a02*a02+a12*a12)))
	for range 64 {
		f := ((l-c2)*l+c1)*l - c0
		df := (3*l-2*c2)*l + c1
		if !(f > 0 && df > 0) {
			break
		}
		next := l - f/df
		if !(next < l) {
			break
		}
		l = next
	}
	s, p := c2-l, c0/l
	mid := (s + math.Sqrt(max(s*s-4*p, 0))) / 2
	return l * mid / p
}
