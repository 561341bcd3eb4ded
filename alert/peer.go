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
	// Pair (PeerDeviations only) says the reference held exactly two
	// members, this one included: the two deviations mirror each other.
	Pair bool
}

// Deviations returns, for one time bucket of a peer group, each member's
// deviation from the median of the other members' values in that bucket.
// A process change moves every member alike and cancels; a drifting
// member stands out in its own deviation, but it also moves the others'
// medians: with two live members wholly, with three by half (each
// healthy member's "others" are the drifter and one healthy member, whose
// median is their mean). PeerDeviations, whose reference includes the
// member itself, does not leak with three or more; prefer it.
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

// PeerDeviations returns, for one time bucket of a peer group, each
// member's deviation from the group's robust reference: the median of
// the values of the members that are live and usable (use[i]; nil means
// every live member). Unlike Deviations, the reference includes the
// member itself, so with three or more members a drifting member cannot
// pull the reference of the healthy ones: with members at 0, 0 and D the
// median is 0 whatever D, while the median of "the two others" of a
// healthy member is D/2, half the drift leaking into it.
//
// With exactly two usable members the reference is their mean and the
// deviations mirror each other (±half the difference): Pair is set, and
// the group can say that the two disagree but not which one drifts
// (see Attribute). With one, that member's deviation is zero and any
// other live member is judged against it (Peers 1); with none, every
// live member falls back to its own value (Own).
//
// use lets the caller leave out of the reference members whose data
// are suspect now (a stuck, silent or spiking member, or one whose own
// alert fires): such a member still gets its deviation from the others'
// reference, so it can be attributed, but it cannot move theirs.
//
// vals, live and use (when not nil) must have the same length (a
// mismatch panics). The result reuses dst's storage. It returns an error
// wrapping ErrNonFinite for a live member with a NaN or infinite value.
func PeerDeviations(dst []Deviation, vals []float64, live, use []bool) ([]Deviation, error) {
	if len(vals) != len(live) || (use != nil && len(use) != len(vals)) {
		panic(fmt.Sprintf("alert: PeerDeviations with %d values, %d live and %d use flags", len(vals), len(live), len(use)))
	}
	dst = slices.Grow(dst[:0], len(vals))[:len(vals)]
	var buf [16]float64
	ref := buf[:0]
	for i, v := range vals {
		if !live[i] {
			continue
		}
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return dst[:0], fmt.Errorf("%w: peer member %d value %v", ErrNonFinite, i, v)
		}
		if use == nil || use[i] {
			ref = append(ref, v)
		}
	}
	slices.Sort(ref)
	n := len(ref)
	var med float64
	if n > 0 {
		med = ref[n/2]
		if n%2 == 0 {
			med = ref[n/2-1]/2 + med/2
		}
	}
	for i, v := range vals {
		if !live[i] {
			dst[i] = Deviation{}
			continue
		}
		in := use == nil || use[i]
		peers := n
		if in {
			peers--
		}
		if peers == 0 {
			dst[i] = Deviation{Live: true, Value: v, Own: true}
			continue
		}
		dst[i] = Deviation{Live: true, Value: v - med, Peers: peers, Pair: in && n == 2}
	}
	return dst, nil
}

// PeerEvidence is what the caller knows of one member at one pane close
// of one window, for Attribute.
type PeerEvidence struct {
	// Judged: the member's deviation window was judged (Decision's
	// Judgement.OK()).
	Judged bool
	// Breach: the member's deviation breaches a limit (its alert of the
	// kind is Pending or Firing on this window).
	Breach bool
	// Own: the member has evidence of its own, independent of the group:
	// a data-quality or step alert, or a fit of its own readings that
	// breaches while its partner's does not.
	Own bool
	// InReference: the member was in the reference (use and live).
	InReference bool
}

// PeerOutcome is Attribute's verdict on one member.
type PeerOutcome uint8

const (
	// PeerUnknown is the zero PeerOutcome.
	PeerUnknown PeerOutcome = iota
	// PeerNotJudged: the member, or too few of the reference members
	// (fewer than two), were judged.
	PeerNotJudged
	// PeerAgrees: judged, no breach.
	PeerAgrees
	// PeerAttributed: the member breaches and every other judged
	// reference member agrees (three or more judged in the reference,
	// or a pair where only this member has evidence of its own): the
	// drift is the member's; its alert and ticket stand.
	PeerAttributed
	// PeerPairDisagreement: a reference of two that disagree, with
	// neither or both having evidence of their own: one of the two
	// drifts, and the group cannot say which. No ticket for either.
	PeerPairDisagreement
	// PeerAmbiguous: the member breaches but so does another reference
	// member: several stand out, or the reference itself moved. No
	// ticket from the group.
	PeerAmbiguous
)

var peerOutcomeNames = [...]string{"unknown", "not_judged", "agrees", "attributed", "pair_disagreement", "ambiguous"}

func (o PeerOutcome) String() string { return enumName(peerOutcomeNames[:], int(o)) }

// MarshalText encodes the name printed by String.
func (o PeerOutcome) MarshalText() ([]byte, error) {
	return marshalEnum(peerOutcomeNames[:], int(o), "peer outcome")
}

// UnmarshalText decodes a name printed by String.
func (o *PeerOutcome) UnmarshalText(b []byte) error {
	return unmarshalEnum(peerOutcomeNames[:], (*uint8)(o), b, "peer outcome")
}

// Attribute decides, for one window of a peer group at one pane close,
// which members a deviation breach belongs to. A member is attributed
// only when the others agree: at least two other judged reference
// members, none of them breaching. In a reference of two, a breach of
// either is a pair disagreement, attributed to one member only when it
// alone has evidence of its own. A member outside the reference is
// attributed when at least two judged reference members agree and none
// breaches. The result reuses dst's storage, one outcome per member.
func Attribute(dst []PeerOutcome, ev []PeerEvidence) []PeerOutcome {
	dst = slices.Grow(dst[:0], len(ev))[:len(ev)]
	var judged, breach int
	for _, e := range ev {
		if e.InReference && e.Judged {
			judged++
			if e.Breach {
				breach++
			}
		}
	}
	for i, e := range ev {
		switch {
		case !e.Judged || judged < 2:
			dst[i] = PeerNotJudged
		case !e.Breach:
			dst[i] = PeerAgrees
		case !e.InReference:
			if breach == 0 {
				dst[i] = PeerAttributed
			} else {
				dst[i] = PeerAmbiguous
			}
		case judged == 2:
			// A pair: the deviations mirror, so both usually breach.
			// Evidence of its own decides, if only one has it.
			var ownPair int
			for _, o := range ev {
				if o.InReference && o.Judged && o.Own {
					ownPair++
				}
			}
			if e.Own && ownPair == 1 {
				dst[i] = PeerAttributed
			} else {
				dst[i] = PeerPairDisagreement
			}
		case breach == 1:
			dst[i] = PeerAttributed
		default:
			dst[i] = PeerAmbiguous
		}
	}
	return dst
}
