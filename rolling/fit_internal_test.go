package rolling

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// TestNormal_Cond checks the condition number of 2×2 and 3×3 normal
// matrices against gonum's symmetric eigendecomposition (mat.EigenSym),
// on matrices from readings spread evenly and from readings crowded into
// a small part of the range.
func TestNormal_Cond(t *testing.T) {
	seed := uint64(17)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	for i := range 500 {
		spread := math.Pow(10, -4*rng.Float64()) // 1 down to 1e-4 of [−1, 1]
		for _, p := range []int{2, 3} {
			ne := normal{p: p}
			n := 5 + rng.IntN(200)
			for range n {
				z := 1 - 2*spread*rng.Float64()
				x := [3]float64{1, z, z * z}
				for r := 0; r < p; r++ {
					for c := r; c < p; c++ {
						ne.g[r][c] += x[r] * x[c]
					}
				}
			}
			var beta [3]float64
			var inv [3][3]float64
			if !ne.solve(&beta, &inv) {
				continue
			}
			sym := mat.NewSymDense(p, nil)
			for r := 0; r < p; r++ {
				for c := r; c < p; c++ {
					sym.SetSym(r, c, ne.g[r][c])
				}
			}
			var es mat.EigenSym
			if !es.Factorize(sym, false) {
				t.Fatal("EigenSym failed")
			}
			ev := es.Values(nil)
			want := ev[len(ev)-1] / ev[0]
			if want > 1e10 {
				continue // beyond what either method resolves
			}
			// Both sides lose about cond·ε, relative, in the smallest
			// eigenvalue; allow 1e-12·cond.
			if got := ne.cond(); math.Abs(got-want)/want > 1e-12*want {
				t.Errorf("case %d p=%d: cond = %.12g, want %.12g", i, p, got, want)
			}
		}
	}
}
