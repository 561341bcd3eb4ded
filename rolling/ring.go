package rolling

import "math"

// ring is a circular array of panes of one width, shared by every window of
// a sensor with that pane width. Slot k mod len(panes) holds pane k, the
// readings with k·w ≤ t < (k+1)·w; a slot with n == 0 is empty. Advancing
// to a newer pane clears the slots it passes, so a non-empty slot always
// holds a pane within the ring's reach and needs no stored index.
type ring struct {
	width  int64   // pane width w, ns
	invW   float64 // 1/w
	newest int64   // index of the newest pane seen; valid when started
	start  bool
	// newSlot is slot(newest), kept so that the common reading, one in
	// the newest pane, costs no integer division.
	newSlot int
	// nextAt is the first time of pane newest+1 (math.MaxInt64 when that
	// lies beyond int64): a reading before it closes no pane, which
	// Sensor.Closes then learns without a division.
	nextAt int64
	// savedStart and savedNewest are start and newest at the last
	// MarkSaved: the horizon has moved since when they differ.
	savedStart  bool
	savedNewest int64
	panes       []pane
	side        []posMoments // nil until a pane becomes mixed
	dirty       []uint64     // bit per slot: changed since the last MarkSaved
	// minPanes is the pane count of the ring's shortest window: a reading
	// at least that many panes behind the newest is late for some window.
	minPanes int64
}

func newRing(width int64, slots int) ring {
	return ring{
		width: width,
		invW:  1 / float64(width),
		panes: make([]pane, slots),
		dirty: make([]uint64, (slots+63)/64),
	}
}

// floorDiv returns ⌊a/b⌋ for b > 0, also for negative a.
func floorDiv(a, b int64) int64 {
	q := a / b
	if a%b != 0 && a < 0 {
		q--
	}
	return q
}

func (r *ring) slot(k int64) int {
	i := k % int64(len(r.panes))
	if i < 0 {
		i += int64(len(r.panes))
	}
	return int(i)
}

// accepts reports whether pane k is within the ring's reach.
func (r *ring) accepts(k int64) bool {
	return !r.start || k > r.newest-int64(len(r.panes))
}

// add folds a reading at t into its pane k = ⌊t/w⌋, sliding the ring first
// if the reading is newer than every pane held. The caller has checked
// accepts.
func (r *ring) add(t, k int64, y, ly float64, pos bool) error {
	r.advance(k)
	i := r.newSlot
	if k != r.newest {
		i = r.slot(k)
	}
	p := &r.panes[i]
	if p.n == ^uint32(0) {
		return ErrPaneFull
	}
	var side *posMoments
	if !pos && !p.mixed() {
		// The pane becomes mixed: from now on its positive time moments
		// are kept apart. Until now every reading was positive.
		if r.side == nil {
			r.side = make([]posMoments, len(r.panes))
		}
		r.side[i] = posMoments{su: p.su, su2: p.su2}
	}
	if r.side != nil && (p.mixed() || !pos) {
		side = &r.side[i]
	}
	p.add(t, r.invW, y, ly, pos, side)
	r.dirty[i>>6] |= 1 << uint(i&63)
	return nil
}

// advance makes pane k the newest if it is newer than every pane held,
// clearing the slots of the panes that leave the ring.
func (r *ring) advance(k int64) {
	if !r.start {
		r.start = true
		r.setNewest(k)
		return
	}
	if k <= r.newest {
		return
	}
	steps := min(k-r.newest, int64(len(r.panes)))
	for j := int64(0); j < steps; j++ {
		i := r.slot(k - j)
		r.panes[i] = pane{}
		if r.side != nil {
			r.side[i] = posMoments{}
		}
		r.dirty[i>>6] &^= 1 << uint(i&63)
	}
	r.setNewest(k)
}

func (r *ring) setNewest(k int64) {
	r.newest, r.newSlot = k, r.slot(k)
	if k >= math.MaxInt64/r.width {
		r.nextAt = math.MaxInt64
	} else {
		r.nextAt = (k + 1) * r.width
	}
}

// posMoments returns Σu and Σu² over the positive readings of slot i.
func (r *ring) posMoments(i int) (su, su2 float64) {
	p := &r.panes[i]
	if !p.mixed() {
		return p.su, p.su2
	}
	return r.side[i].su, r.side[i].su2
}
