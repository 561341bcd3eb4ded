package rolling

// pane holds the sufficient statistics of the readings of one pane.
//
// Time enters as u = (t − tmin)/w ∈ [0, 1), the position after the pane's
// earliest reading in units of the pane width, so the power sums stay of
// order one whatever the epoch, and readings bunched into a small part of
// a wide pane keep their digits: with u measured from the pane's centre,
// as before, a cluster at offset c and spread s from the centre lost
// about (c/s)² in Σu² once shifted onto the window's time. A reading
// earlier than tmin (out of order) re-anchors the sums exactly (shift).
// Values enter relative to y0, the pane's first value (and ln-values
// relative to l0, the log of its first positive value), so that a level
// of 10⁶ with noise of 10⁻³ does not cancel away in Σy². A window
// combines its panes by shifting these sums exactly to a common origin
// when it is solved.
//
// The last four words serve the serial correlation of the residuals (see
// Fit.R1): over consecutive readings of the pane in time order, with
// d = y_i − y_{i−1} and Δu = u_i − u_{i−1}, they keep Σd², Σd·Δu, ΣΔu²,
// and the value of the latest reading, so Solve can form the lag-1
// products of the residuals and bridge to the neighbouring panes. They
// need readings in time order: a reading earlier than the latest one of
// its pane marks the pane unordered (sdu2 = −1), and its pairs are then
// left out of the estimate. Readings at equal times count as in order.
//
// The layout is 20 words, 160 bytes. Readings with y ≤ 0 make a pane
// "mixed": the exp fit then needs the time moments of the positive readings
// alone, which live in the ring's side table so the common case stays small.
type pane struct {
	tmin, tmax int64 // first and last reading time, Unix ns; valid when n > 0
	n, npos    uint32
	y0, l0     float64
	su, su2    float64 // Σu, Σu²
	su3, su4   float64 // Σu³, Σu⁴
	sy, suy    float64 // Σỹ, Σuỹ with ỹ = y − y0
	su2y, syy  float64 // Σu²ỹ, Σỹ²
	sl, sul    float64 // Σl̃, Σul̃ with l̃ = ln y − l0, over y > 0
	sll        float64 // Σl̃²
	ylast      float64 // value of the reading at tmax (ordered panes)
	sdd, sddu  float64 // Σd², Σd·Δu over consecutive readings
	sdu2       float64 // ΣΔu²; −1: the pane's readings came out of order
}

// posMoments are Σu and Σu² over the positive readings of a mixed pane.
type posMoments struct{ su, su2 float64 }

func (p *pane) mixed() bool { return p.n != p.npos }

// ordered reports whether the pane's readings arrived in time order, so
// its lag sums hold.
func (p *pane) ordered() bool { return p.sdu2 >= 0 }

// add folds one reading into the pane. ly = ln y when pos (y > 0).
// side is the pane's slot in the ring's side table, non-nil only when the
// pane is mixed or about to become mixed. invW is 1/w.
func (p *pane) add(t int64, invW, y, ly float64, pos bool, side *posMoments) {
	if p.n == 0 {
		p.tmin, p.tmax, p.y0, p.ylast = t, t, y, y
	} else if t >= p.tmax {
		// In time order, the common case.
		if p.ordered() {
			d, du := y-p.ylast, float64(t-p.tmax)*invW
			p.sdd += d * d
			p.sddu += d * du
			p.sdu2 += du * du
			p.ylast = y
		}
		p.tmax = t
	} else {
		p.sdu2 = -1
		if t < p.tmin {
			p.shift(float64(p.tmin-t)*invW, side)
			p.tmin = t
		}
	}
	u := float64(t-p.tmin) * invW
	u2 := u * u
	if side != nil && pos {
		side.su += u
		side.su2 += u2
	}
	p.su += u
	p.su2 += u2
	p.su3 += u2 * u
	p.su4 += u2 * u2
	dy := y - p.y0
	p.sy += dy
	p.suy += u * dy
	p.su2y += u2 * dy
	p.syy += dy * dy
	if pos {
		if p.npos == 0 {
			p.l0 = ly
		}
		dl := ly - p.l0
		p.sl += dl
		p.sul += u * dl
		p.sll += dl * dl
		p.npos++
	}
	p.n++
}

// shift re-expresses the time sums for u' = u + δ, as when the anchor
// moves δ pane widths earlier (δ > 0: every term of the binomial
// expansions is then non-negative in the power sums, so nothing cancels).
// side, when not nil, holds the positive readings' moments of a mixed pane.
func (p *pane) shift(d float64, side *posMoments) {
	n := float64(p.n)
	su, su2, su3 := p.su, p.su2, p.su3
	p.su4 += d * (4*su3 + d*(6*su2+d*(4*su+d*n)))
	p.su3 += d * (3*su2 + d*(3*su+d*n))
	p.su2 += d * (2*su + d*n)
	p.su += d * n
	sy, suy := p.sy, p.suy
	p.su2y += d * (2*suy + d*sy)
	p.suy += d * sy
	p.sul += d * p.sl
	if side != nil {
		np := float64(p.npos)
		side.su2 += d * (2*side.su + d*np)
		side.su += d * np
	}
}
