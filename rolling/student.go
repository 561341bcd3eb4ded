package rolling

import (
	"math"
	"sync"

	"gonum.org/v1/gonum/mathext"
)

// tTableSize bounds the degrees of freedom whose 97.5% Student's t quantile
// is taken from StudentQuantile (computed once, on first use); above it
// the Cornish–Fisher expansion below is accurate to better than 1e-13.
const tTableSize = 1024

var (
	tTableOnce sync.Once
	tTable     [tTableSize]float64
)

// z975 is the 97.5% quantile of the standard normal distribution,
// √2·erfc⁻¹(0.05).
var z975 = math.Sqrt2 * math.Erfcinv(0.05)

// t975 returns the 97.5% quantile of Student's t with df degrees of
// freedom, so that ±t975(df) bounds a two-sided 95% interval.
func t975(df int) float64 {
	if df < 1 {
		return math.Inf(1)
	}
	if df < tTableSize {
		tTableOnce.Do(func() {
			for v := 1; v < tTableSize; v++ {
				tTable[v] = StudentQuantile(0.975, float64(v))
			}
		})
		return tTable[df]
	}
	v := 1 / float64(df)
	return z975 + v*(g975[0]+v*(g975[1]+v*(g975[2]+v*g975[3])))
}

// g975 are the coefficients g1…g4 of cornishFisherAt for the normal
// quantile z975, computed once: Solve needs t975 for every fit.
var g975 = cornishFisherCoefs(z975)

// cfMinDF is the least ν for which StudentQuantile uses cornishFisher.
const cfMinDF = 1000

// cornishFisher returns the p quantile of Student's t with ν degrees of
// freedom from the normal quantile x of p: Abramowitz & Stegun, Handbook
// of Mathematical Functions, 26.7.5.
func cornishFisher(p, nu float64) float64 {
	// x = −√2·erfc⁻¹(2p): accurate in both tails, where 2p − 1 is not.
	var x float64
	if p < 0.5 {
		x = -math.Sqrt2 * math.Erfcinv(2*p)
	} else {
		x = math.Sqrt2 * math.Erfcinv(2*(1-p))
	}
	return cornishFisherAt(x, nu)
}

// cornishFisherAt is t ≈ x + g1/ν + g2/ν² + g3/ν³ + g4/ν⁴ with x the
// normal quantile (A&S 26.7.5).
func cornishFisherAt(x, nu float64) float64 {
	g := cornishFisherCoefs(x)
	v := 1 / nu
	return x + v*(g[0]+v*(g[1]+v*(g[2]+v*g[3])))
}

func cornishFisherCoefs(x float64) [4]float64 {
	x2 := x * x
	return [4]float64{
		(x2 + 1) * x / 4,
		((5*x2+16)*x2 + 3) * x / 96,
		(((3*x2+19)*x2+17)*x2 - 15) * x / 384,
		((((79*x2+776)*x2+1482)*x2-1920)*x2 - 945) * x / 92160,
	}
}

// StudentQuantile returns the p quantile of Student's t distribution
// with nu degrees of freedom (nu > 0, not necessarily whole): the t with
// P(T ≤ t) = p. It returns NaN for p outside (0, 1) or nu not positive,
// and ±Inf for p = 1 or 0.
//
// Through the regularized incomplete beta function I, the tail beyond
// s > 0 is Q(s) = ½·I(ν/(ν+s²); ν/2, ½) and the central part
// P(|T| < s) = I(s²/(ν+s²); ½, ν/2) (Abramowitz & Stegun 26.7.1 with
// 26.5.27). A first s comes from the inverse of I (gonum mathext, after
// Cephes incbi); Newton steps on the form of the two that has no
// cancellation for the p at hand (the tail for p beyond ¼ or ¾, else the
// central part) then polish it with the density
// f(s) = Γ((ν+1)/2)/(√(νπ)·Γ(ν/2))·(1+s²/ν)^(−(ν+1)/2). The result
// agrees with the closed forms for ν = 1, 2, 4 to 13 or more
// significant digits (student_test.go), where gonum's distuv.StudentsT
// agrees to about 9. The incomplete beta function loses digits as ν
// grows (measured against the expansion below: 1e-13 at ν = 1000, 2e-11
// at 10⁵), so from ν = 1000 on the Cornish–Fisher expansion of
// Abramowitz & Stegun 26.7.5 is used instead, whose terms to ν⁻⁴ leave an
// error of order ν⁻⁵: below 1e-13 there for 1e-4 ≤ p ≤ 1 − 1e-4.
func StudentQuantile(p, nu float64) float64 {
	switch {
	case !(p >= 0 && p <= 1) || !(nu > 0) || math.IsInf(nu, 0):
		return math.NaN()
	case p == 0:
		return math.Inf(-1)
	case p == 1:
		return math.Inf(1)
	case p == 0.5:
		return 0
	}
	if nu >= cfMinDF {
		return cornishFisher(p, nu)
	}
	q := min(p, 1-p) // tail probability beyond s
	a := nu / 2
	tail := q < 0.25
	var s float64
	if tail {
		x := mathext.InvRegIncBeta(a, 0.5, 2*q)
		s = math.Sqrt(nu * (1 - x) / x)
	} else {
		y := mathext.InvRegIncBeta(0.5, a, 1-2*q)
		s = math.Sqrt(nu * y / (1 - y))
	}
	lc, _ := math.Lgamma((nu + 1) / 2)
	lh, _ := math.Lgamma(a)
	logc := lc - lh - 0.5*math.Log(nu*math.Pi)
	for range 8 {
		dens := math.Exp(logc - (nu+1)/2*math.Log1p(s*s/nu))
		var g float64 // Q(s) − q, positive when s is short of the quantile
		if tail {
			g = 0.5*mathext.RegIncBeta(a, 0.5, nu/(nu+s*s)) - q
		} else {
			g = (1-2*q)/2 - 0.5*mathext.RegIncBeta(0.5, a, s*s/(nu+s*s))
		}
		if !(dens > 0) || math.IsInf(s, 0) {
			break
		}
		step := g / dens
		s += step
		if math.Abs(step) <= 1e-16*s {
			break
		}
	}
	if p < 0.5 {
		return -s
	}
	return s
}
