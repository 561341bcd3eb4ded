package chart_test

import (
	"math"
	"testing"

	"driftfit/cmd/driftfit/internal/chart"
)

func TestPercentile_Type7(t *testing.T) {
	// R: quantile(1:10, c(0.02, 0.5, 0.98)) gives 1.18, 5.5, 9.82
	// (type 7: 1 + p·(n − 1) order statistic, interpolated).
	xs := []float64{10, 9, 8, 7, 6, 5, 4, 3, 2, 1}
	for _, tc := range []struct{ p, want float64 }{{0.02, 1.18}, {0.5, 5.5}, {0.98, 9.82}, {0, 1}, {1, 10}} {
		if got := chart.Percentile(xs, tc.p); math.Abs(got-tc.want) > 1e-12 {
			t.Errorf("chart.Percentile(1..10, %v) = %v, want %v", tc.p, got, tc.want)
		}
	}
}

func TestRobustRange_IgnoresAFewWildRecords(t *testing.T) {
	// 100 readings 0..99 and one of 1e6: the 98th percentile of the 101
	// values is the 99th order statistic (1 + 0.98·100 = 99), 98, so the
	// axis ends at 98 + 8% of 98 − 2 = 105.68, not near 1e6.
	var xs []float64
	for i := range 100 {
		xs = append(xs, float64(i))
	}
	xs = append(xs, 1e6)
	lo, hi := chart.RobustRange(xs, nil)
	if math.Abs(hi-105.68) > 1e-9 || math.Abs(lo-(2-7.68)) > 1e-9 {
		t.Errorf("RobustRange = [%v, %v], want [-5.68, 105.68]", lo, hi)
	}
	// An anchor (a tolerance edge) widens the range to hold it.
	if _, hi := chart.RobustRange(xs, []float64{200}); math.Abs(hi-(200+0.08*198)) > 1e-9 {
		t.Errorf("with anchor 200: hi = %v, want 215.84", hi)
	}
	// Constant values still give a range.
	if lo, hi := chart.RobustRange([]float64{5, 5, 5}, nil); !(lo < 5 && hi > 5) {
		t.Errorf("constant: [%v, %v]", lo, hi)
	}
}
