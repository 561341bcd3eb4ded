package rolling_test

import (
	"fmt"
	"math"
	"testing"

	"driftfit/rolling"
)

// TestStudentQuantile checks the quantile against the closed forms of
// Student's t for 1, 2 and 4 degrees of freedom (e.g. Hill 1970, Comm.
// ACM 13(10), 617–619, and the quantile function listed for these ν in
// the standard references; written out below) to 13 significant digits:
//
//	ν = 1: t = tan(π(p − ½)) = −1/tan(πp)       (Cauchy)
//	ν = 2: t = (2p − 1)/√(2p(1 − p))
//	ν = 4: t = sign(p − ½)·2√(q − 1), q = cos(⅓·arccos(√α))/√α, α = 4p(1 − p)
//
// The closed forms are evaluated in float64 too, so each side carries a
// few ulps; 13 digits leaves room for both.
func TestStudentQuantile(t *testing.T) {
	closed := map[float64]func(p float64) float64{
		// −1/tan(πp), with 1 − p (exact for p > ½) near 1: tan(π(p − ½))
		// itself loses digits to the rounding of π(p − ½) near its pole.
		1: func(p float64) float64 {
			if p > 0.5 {
				return 1 / math.Tan(math.Pi*(1-p))
			}
			return -1 / math.Tan(math.Pi*p)
		},
		2: func(p float64) float64 { return (2*p - 1) / math.Sqrt(2*p*(1-p)) },
		4: func(p float64) float64 {
			al := 4 * p * (1 - p)
			q := math.Cos(math.Acos(math.Sqrt(al))/3) / math.Sqrt(al)
			return math.Copysign(2*math.Sqrt(q-1), p-0.5)
		},
	}
	ps := []float64{1e-6, 0.001, 0.01, 0.025, 0.05, 0.1, 0.2, 0.3, 0.4, 0.45, 0.6, 0.7, 0.8, 0.9, 0.95, 0.975, 0.99, 0.995, 0.999}
	worst := 16.0
	for _, nu := range []float64{1, 2, 4} {
		for _, p := range ps {
			got, want := rolling.StudentQuantile(p, nu), closed[nu](p)
			d := 16.0
			if got != want {
				d = -math.Log10(math.Abs(got-want) / math.Abs(want))
			}
			worst = min(worst, d)
			if !(d >= 13) {
				t.Errorf("StudentQuantile(%g, %g) = %.17g, want %.17g (%.1f digits)", p, nu, got, want, d)
			}
		}
	}
	t.Logf("fewest digits agreed: %.1f", worst)
	// Table values of R's qt(p, ν) printed to 16 digits, from memory;
	// they agree with the above to 15 digits, so they are held to 13.
	for _, c := range []struct{ p, nu, want float64 }{
		{0.975, 5, 2.570581835636314},
		{0.975, 10, 2.228138851986274},
		{0.975, 30, 2.042272456301238},
		{0.95, 10, 1.812461122811676},
	} {
		if got := rolling.StudentQuantile(c.p, c.nu); math.Abs(got-c.want) > 1e-13*c.want {
			t.Errorf("StudentQuantile(%g, %g) = %.16g, want %.16g", c.p, c.nu, got, c.want)
		}
	}
}

// TestStudentQuantile_Properties checks symmetry, the edges, and the
// normal limit for large ν against Abramowitz & Stegun 26.7.5 as t975
// uses it above 1023 degrees of freedom (t975 itself is checked through
// the fits' TCrit).
func TestStudentQuantile_Properties(t *testing.T) {
	for _, nu := range []float64{0.5, 1, 3, 7.5, 30, 1000} {
		// p with an exact complement 1 − p in float64.
		for _, p := range []float64{0x1p-7, 0.3125, 0.9765625} {
			if a, b := rolling.StudentQuantile(p, nu), rolling.StudentQuantile(1-p, nu); a != -b {
				t.Errorf("ν=%g: quantile(%g) = %.17g, quantile(%g) = %.17g, want opposite", nu, p, a, 1-p, b)
			}
		}
	}
	for _, c := range []struct{ p, nu float64 }{{-0.1, 3}, {1.1, 3}, {0.5, 0}, {0.3, math.NaN()}, {math.NaN(), 3}} {
		if v := rolling.StudentQuantile(c.p, c.nu); !math.IsNaN(v) {
			t.Errorf("StudentQuantile(%g, %g) = %g, want NaN", c.p, c.nu, v)
		}
	}
	if rolling.StudentQuantile(0.5, 3) != 0 || !math.IsInf(rolling.StudentQuantile(1, 3), 1) {
		t.Error("quantile 0.5 must be 0 and quantile 1 +Inf")
	}
	// Cornish–Fisher to ν⁻⁴ errs by O(ν⁻⁵): below 1e-13 at ν = 1024.
	z := math.Sqrt2 * math.Erfcinv(0.05)
	x2 := z * z
	g := [4]float64{(x2 + 1) * z / 4, ((5*x2+16)*x2 + 3) * z / 96, (((3*x2+19)*x2+17)*x2 - 15) * z / 384,
		((((79*x2+776)*x2+1482)*x2-1920)*x2 - 945) * z / 92160}
	for _, nu := range []float64{999, 1000, 1024, 5000} {
		v := 1 / nu
		cf := z + v*(g[0]+v*(g[1]+v*(g[2]+v*g[3])))
		if got := rolling.StudentQuantile(0.975, nu); math.Abs(got-cf) > 1e-13*cf {
			t.Errorf("ν=%g: quantile %.17g, Cornish–Fisher %.17g", nu, got, cf)
		}
	}
}

func ExampleStudentQuantile() {
	// Two-sided 95% with 10 degrees of freedom, and the closed form for
	// ν = 2: t = (2p − 1)/√(2p(1 − p)) = 0.95/√0.04875 at p = 0.975.
	fmt.Printf("%.6f %.6f\n", rolling.StudentQuantile(0.975, 10), rolling.StudentQuantile(0.975, 2))
	// Output: 2.228139 4.302653
}
