package rolling

import (
	"math"
	"time"
)

// Rebase re-expresses a Line or Parabola fit in the time variable
// τ' = (t − origin)/unit instead of τ = (t − Last)/day, returning the
// coefficients and their standard errors. It is exact algebra on the fit
// (a polynomial change of variable), useful to compare with coefficients
// published for another origin, or to report rates per hour or per year.
func (f *Fit) Rebase(origin time.Time, unit time.Duration) (coef, se [3]float64) {
	alpha := float64(unit) / nanosPerDay
	beta := float64(origin.Sub(f.Last)) / nanosPerDay
	p := f.Model.Coefs()
	t := [3][3]float64{
		{1, beta, beta * beta},
		{0, alpha, 2 * alpha * beta},
		{0, 0, alpha * alpha},
	}
	for r := 0; r < p; r++ {
		var v float64
		for k := 0; k < p; k++ {
			v += t[r][k] * f.Coef[k]
		}
		coef[r] = v
		var w float64
		for a := 0; a < p; a++ {
			for b := 0; b < p; b++ {
				w += t[r][a] * f.Cov[a][b] * t[r][b]
			}
		}
		se[r] = math.Sqrt(max(w, 0))
	}
	return coef, se
}
