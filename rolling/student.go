package rolling

import (
	"math"
	"sync"

	"gonum.org/v1/gonum/stat/distuv"
)

// tTableSize bounds the degrees of freedom whose 97.5% Student's t quantile
// is taken from distuv (computed once, on first use); above it the
// Cornish–Fisher expansion below is accurate to better than 1e-13.
const tTableSize = 1024

var (
	tTableOnce sync.Once
	tTable     [tTableSize]float64
)

// z975 is the 97.5% quantile of the standard normal distribution.
var z975 = distuv.UnitNormal.Quantile(0.975)

// t975 returns the 97.5% quantile of Student's t with df degrees of
// freedom, so that ±t975(df) bounds a two-sided 95% interval.
func t975(df int) float64 {
	if df < 1 {
		return math.Inf(1)
	}
	if df < tTableSize {
		tTableOnce.Do(func() {
			for v := 1; v < tTableSize; v++ {
				tTable[v] = distuv.StudentsT{Mu: 0, Sigma: 1, Nu: float64(v)}.Quantile(0.975)
			}
		})
		return tTable[df]
	}
	// Abramowitz & Stegun, Handbook of Mathematical Functions, 26.7.5:
	// t ≈ x + g1/ν + g2/ν² + g3/ν³ + g4/ν⁴ with x the normal quantile.
	x := z975
	x2 := x * x
	g1 := (x2 + 1) * x / 4
	g2 := ((5*x2+16)*x2 + 3) * x / 96
	g3 := (((3*x2+19)*x2+17)*x2 - 15) * x / 384
	g4 := ((((79*x2+776)*x2+1482)*x2-1920)*x2 - 945) * x / 92160
	v := 1 / float64(df)
	return x + v*(g1+v*(g2+v*(g3+v*g4)))
}
