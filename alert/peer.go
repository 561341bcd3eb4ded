package alert

import (
	"fmt"
	"math"
	"slices"
)

// Deviation is one group member's signal in one time bucket.
type Deviation struct {
	// Live says the member has a value in the bucket; the other fields
	// are zero when it does not.
	Live bool
	// Value is the member's value minus the median of the other live
	// members' values (with one other: the difference), or, when Own,
	// the member's value itself.
	Value float64
	// Peers is the count of other live members the median was taken
	// over.
	Peers int
	// Own says no other member was live: the peer comparison falls back
	// to the member's own signal, and a process change is not cancelled.
	Own bool
}

// Deviations returns, for one time bucket of a peer group, each member's
// deviation from the median of the other members' values in that bucket.
// A process change moves every member alike and cancels; a drifting
// member stands out in its own deviation, and moves the others' medians
// only when the group has two live members.
//
// vals[i] is member i's value in the bucket (for example the mean of its
// readings there) and live[i] says whether it has one; vals and live must
// have the same length (a mismatch panics). The result reuses dst's
// storage when it is large enough; feed each member's Value, at the
// bucket's time, into a rolling.Sensor of its own. It returns an error
// wrapping ErrNonFinite for a live member with a NaN or infinite value,
// naming its index.
func Deviations(dst []Deviation, vals []float64, live []bool) ([]Deviation, error) {
	if len(vals) != len(live) {
		panic(fmt.Sprintf("alert: Deviations with %d values and %d live flags", len(vals), len(live)))
	}
	dst = slices.Grow(dst[:0], len(vals))[:len(vals)]
	var buf [16]float64
	sorted := buf[:0]
	for i, v := range vals {
		if !live[i] {
			continue
		}
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return dst[:0], fmt.Errorf("%w: peer member %d value %v", ErrNonFinite, i, v)
		}
		sorted = append(sorted, v)
	}
	slices.Sort(sorted)
	n := len(sorted) - 1 // others of each live member
	for i, v := range vals {
		if !live[i] {
			dst[i] = Deviation{}
			continue
		}
		if n == 0 {
			dst[i] = Deviation{Live: true, Value: v, Own: true}
			continue
		}
		// The others are sorted without one copy of v, at index p.
		p, _ := slices.BinarySearch(sorted, v)
		at := func(k int) float64 {
			if k < p {
				return sorted[k]
			}
			return sorted[k+1]
		}
		med := at(n / 2)
		if n%2 == 0 {
			med = at(n/2-1)/2 + med/2 // halving is exact: no overflow, same rounding as (a+b)/2
		}
		dst[i] = Deviation{Live: true, Value: v - med, Peers: n}
	}
	return dst, nil
}
