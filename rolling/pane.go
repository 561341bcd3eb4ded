package rolling

// pane holds the sufficient statistics of the readings of one pane.
//
// Time enters as u = (t − start)/w − ½ ∈ [−½, ½), the position inside the
// pane, so the power sums stay of order one whatever the epoch. Values enter
// relative to y0, the pane's first value (and ln-values relative to l0, the
// log of its first positive value), so that a level of 10⁶ with noise of
// 10⁻³ does not cancel away in Σy². A window combines its panes by shifting
// these sums exactly to a common origin when it is solved.
//
// The layout is 16 words, 128 bytes. Readings with y ≤ 0 make a pane
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
}

// posMoments are Σu and Σu² over the positive readings of a mixed pane.
type posMoments struct{ su, su2 float64 }

func (p *pane) mixed() bool { return p.n != p.npos }

// add folds one reading into the pane. ly = ln y when pos (y > 0).
// side is the pane's slot in the ring's side table, non-nil only when the
// pane is mixed or about to become mixed.
func (p *pane) add(t int64, u, y, ly float64, pos bool, side *posMoments) {
	if p.n == 0 {
		p.tmin, p.tmax, p.y0 = t, t, y
	} else if t < p.tmin {
		p.tmin = t
	} else if t > p.tmax {
		p.tmax = t
	}
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
