package chart

import (
	"math"
	"slices"
)

// Percentile returns the p-quantile (0..1) of xs by linear interpolation
// between order statistics (Hyndman and Fan 1996, definition 7, R's
// default); NaN for no values. xs is sorted in place.
func Percentile(xs []float64, p float64) float64 {
	slices.Sort(xs)
	if len(xs) == 0 {
		return math.NaN()
	}
	h := p * float64(len(xs)-1)
	lo := int(math.Floor(h))
	hi := min(lo+1, len(xs)-1)
	return xs[lo] + (h-float64(lo))*(xs[hi]-xs[lo])
}

// Axis margin and trimmed tails of RobustRange.
const (
	// RangeTail is the fraction of the noisy values left out at either
	// end: one wild record among fifty does not set the scale.
	RangeTail = 0.02
	// RangeMargin is the room left either side, as a fraction of the
	// range, so curves do not run along the frame.
	RangeMargin = 0.08
)

// RobustRange is a value axis: the 2nd to 98th percentiles of the noisy
// values (so a few wild records do not flatten the rest), widened to
// hold the anchors (tolerance edges, limits, fitted curves), plus a
// margin of 8% either side. NaN and infinite values are ignored; with
// nothing left the range is [0, 1], and a single value gets ±1% of
// itself (at least 1e-9). noisy is not changed.
func RobustRange(noisy, anchors []float64) (lo, hi float64) {
	lo, hi = math.Inf(1), math.Inf(-1)
	var xs []float64
	for _, v := range noisy {
		if !math.IsNaN(v) && !math.IsInf(v, 0) {
			xs = append(xs, v)
		}
	}
	if len(xs) > 0 {
		lo, hi = Percentile(xs, RangeTail), Percentile(xs, 1-RangeTail)
	}
	for _, v := range anchors {
		if !math.IsNaN(v) && !math.IsInf(v, 0) {
			lo, hi = min(lo, v), max(hi, v)
		}
	}
	if math.IsInf(lo, 0) {
		return 0, 1
	}
	if hi-lo <= 0 {
		d := max(math.Abs(lo)*0.01, 1e-9)
		lo, hi = lo-d, hi+d
	}
	m := RangeMargin * (hi - lo)
	return lo - m, hi + m
}
