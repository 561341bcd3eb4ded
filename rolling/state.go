package rolling

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"math/bits"
	"time"
)

// PaneKey names one pane of a sensor: the pane of width Width with index
// Index holds the readings with Index·Width ≤ t < (Index+1)·Width.
type PaneKey struct {
	Width time.Duration
	Index int64
}

// Pane encodings: 160 bytes, or 176 for a pane holding readings with
// y ≤ 0 (the positive readings' time moments follow). Little endian:
// tmin, tmax int64; n, npos uint32; y0, l0, su, su2, su3, su4, sy, suy,
// su2y, syy, sl, sul, sll, ylast, sdd, sddu, sdu2 as IEEE 754 bits.
//
// LoadPane also reads the earlier layout of 128 (144) bytes, which ends
// at sll and measured time from the pane's centre: its sums are shifted
// onto the pane's earliest reading and its serial-correlation sums are
// marked unknown (the pane counts as unordered), so a restart after an
// upgrade keeps every window.
const (
	paneSize            = 160
	mixedPaneSize       = paneSize + 16
	legacyPaneSize      = 128
	legacyMixedPaneSize = legacyPaneSize + 16
)

// ErrBadPane is returned by LoadPane for data that is not a valid pane
// encoding for its key.
var ErrBadPane = errors.New("rolling: bad pane encoding")

// Changed calls fn for every pane that received readings since the last
// call to MarkSaved, so that a store writes only those; panes a window
// has slid past are not reported (see Horizon).
func (s *Sensor) Changed(fn func(PaneKey)) {
	for j := range s.rings {
		rg := &s.rings[j]
		sn := rg.newSlot
		for w, word := range rg.dirty {
			for word != 0 {
				i := w*64 + bits.TrailingZeros64(word)
				word &= word - 1
				// Slot i holds the pane k ≡ i (mod P) with newest−P < k ≤ newest.
				k := rg.newest - int64(sn-i)
				if i > sn {
					k -= int64(len(rg.panes))
				}
				if rg.panes[i].n > 0 {
					fn(PaneKey{Width: time.Duration(rg.width), Index: k})
				}
			}
		}
	}
}

// MarkSaved clears the record of changed panes and notes the horizons
// and that the sensor, with its window specs, was saved.
func (s *Sensor) MarkSaved() {
	for j := range s.rings {
		rg := &s.rings[j]
		clear(rg.dirty)
		rg.savedStart, rg.savedNewest = rg.start, rg.newest
	}
	s.saved = true
}

// Saved reports whether MarkSaved was called since the sensor was made:
// a store need not write its window specs again.
func (s *Sensor) Saved() bool { return s.saved }

// Horizon calls fn with each pane width of the sensor and the index of
// the oldest pane still held: stored panes of that width with a lower
// index are gone from every window and may be deleted.
func (s *Sensor) Horizon(fn func(width time.Duration, oldest int64)) {
	s.horizon(false, fn)
}

// HorizonMoved is Horizon for the widths whose oldest pane index moved
// since the last MarkSaved (all of them before the first): only there
// can stored panes have fallen out of every window since.
func (s *Sensor) HorizonMoved(fn func(width time.Duration, oldest int64)) {
	s.horizon(true, fn)
}

func (s *Sensor) horizon(moved bool, fn func(width time.Duration, oldest int64)) {
	for j := range s.rings {
		rg := &s.rings[j]
		if !rg.start || moved && rg.savedStart && rg.savedNewest == rg.newest {
			continue
		}
		fn(time.Duration(rg.width), rg.newest-int64(len(rg.panes))+1)
	}
}

func (s *Sensor) ringOf(width time.Duration) *ring {
	for j := range s.rings {
		if s.rings[j].width == int64(width) {
			return &s.rings[j]
		}
	}
	return nil
}

// AppendPane appends the encoding of the pane named by key to dst. It
// returns dst unchanged when the sensor holds no such pane.
func (s *Sensor) AppendPane(dst []byte, key PaneKey) []byte {
	rg := s.ringOf(key.Width)
	if rg == nil || !rg.start || key.Index > rg.newest || key.Index <= rg.newest-int64(len(rg.panes)) {
		return dst
	}
	i := rg.slot(key.Index)
	p := &rg.panes[i]
	if p.n == 0 {
		return dst
	}
	dst = binary.LittleEndian.AppendUint64(dst, uint64(p.tmin))
	dst = binary.LittleEndian.AppendUint64(dst, uint64(p.tmax))
	dst = binary.LittleEndian.AppendUint32(dst, p.n)
	dst = binary.LittleEndian.AppendUint32(dst, p.npos)
	for _, v := range p.floats() {
		dst = binary.LittleEndian.AppendUint64(dst, math.Float64bits(*v))
	}
	if p.mixed() {
		dst = binary.LittleEndian.AppendUint64(dst, math.Float64bits(rg.side[i].su))
		dst = binary.LittleEndian.AppendUint64(dst, math.Float64bits(rg.side[i].su2))
	}
	return dst
}

// LoadPane restores a pane written by AppendPane, as when a sensor is
// rebuilt from storage. Load panes of one width in increasing Index, as
// a key-ordered store returns them; a pane newer than those held slides
// the ring like a reading would. It returns ErrTooOld for a pane already
// outside the ring (the store may delete it), ErrBadSpec for a width the
// sensor has no window of, and ErrBadPane for malformed data. The pane
// is not marked changed.
func (s *Sensor) LoadPane(key PaneKey, data []byte) error {
	rg := s.ringOf(key.Width)
	if rg == nil {
		return fmt.Errorf("%w: no window with pane %v", ErrBadSpec, key.Width)
	}
	var p pane
	var side posMoments
	if err := decodePane(&p, &side, key, data); err != nil {
		return err
	}
	if !rg.accepts(key.Index) {
		return ErrTooOld
	}
	rg.advance(key.Index)
	i := rg.slot(key.Index)
	rg.panes[i] = p
	if p.mixed() {
		if rg.side == nil {
			rg.side = make([]posMoments, len(rg.panes))
		}
		rg.side[i] = side
	}
	return nil
}

func (p *pane) floats() [17]*float64 {
	return [17]*float64{&p.y0, &p.l0, &p.su, &p.su2, &p.su3, &p.su4, &p.sy, &p.suy, &p.su2y, &p.syy, &p.sl, &p.sul, &p.sll,
		&p.ylast, &p.sdd, &p.sddu, &p.sdu2}
}

func decodePane(p *pane, side *posMoments, key PaneKey, data []byte) error {
	bad := func(what string) error {
		return fmt.Errorf("%w: pane %v/%d: %s", ErrBadPane, key.Width, key.Index, what)
	}
	if key.Width <= 0 {
		return bad("width not positive")
	}
	size, mixedSize := paneSize, mixedPaneSize
	legacy := len(data) == legacyPaneSize || len(data) == legacyMixedPaneSize
	if legacy {
		size, mixedSize = legacyPaneSize, legacyMixedPaneSize
	} else if len(data) != paneSize && len(data) != mixedPaneSize {
		return bad(fmt.Sprintf("length %d", len(data)))
	}
	le := binary.LittleEndian
	p.tmin = int64(le.Uint64(data[0:]))
	p.tmax = int64(le.Uint64(data[8:]))
	p.n = le.Uint32(data[16:])
	p.npos = le.Uint32(data[20:])
	off := 24
	for _, v := range p.floats() {
		if off == size {
			break
		}
		*v = math.Float64frombits(le.Uint64(data[off:]))
		if math.IsNaN(*v) || math.IsInf(*v, 0) {
			return bad("non-finite sum")
		}
		off += 8
	}
	switch {
	case p.n == 0:
		return bad("no readings")
	case p.npos > p.n:
		return bad("more positive readings than readings")
	case p.tmin > p.tmax:
		return bad("first reading after last")
	case floorDiv(p.tmin, int64(key.Width)) != key.Index || floorDiv(p.tmax, int64(key.Width)) != key.Index:
		return bad("reading times outside the pane")
	case p.mixed() != (len(data) == mixedSize):
		return bad("positive moments present iff the pane has readings ≤ 0")
	}
	if p.mixed() {
		side.su = math.Float64frombits(le.Uint64(data[size:]))
		side.su2 = math.Float64frombits(le.Uint64(data[size+8:]))
		if math.IsNaN(side.su) || math.IsNaN(side.su2) || math.IsInf(side.su, 0) || math.IsInf(side.su2, 0) {
			return bad("non-finite sum")
		}
	}
	if legacy {
		// u was (t − k·w)/w − ½: shift onto u = (t − tmin)/w.
		w := int64(key.Width)
		var sp *posMoments
		if p.mixed() {
			sp = side
		}
		p.shift(0.5-float64(p.tmin-key.Index*w)/float64(w), sp)
		p.ylast, p.sdd, p.sddu, p.sdu2 = p.y0, 0, 0, -1
	}
	switch {
	case !momentsPlausible(float64(p.n), p.su, p.su2, p.su3, p.su4):
		return bad("time moments impossible for positions in [0, 1)")
	case p.mixed() && !momentsPlausible(float64(p.npos), side.su, side.su2, 0, 0):
		return bad("positive readings' time moments impossible for positions in [0, 1)")
	case !spreadPlausible(float64(p.n), p.sy, p.syy, p.su2, p.suy) || !spreadPlausible(float64(p.npos), p.sl, p.sll, p.su2, p.sul):
		return bad("value sums impossible (negative square sum or Cauchy–Schwarz violated)")
	case !(math.Abs(p.y0) <= maxValue) || !(math.Abs(p.ylast) <= maxValue):
		return bad(fmt.Sprintf("first or last value beyond ±%g", maxValue))
	case !(p.syy <= float64(p.n)*maxDiff2*(1+plausTol)) || !(p.sdd <= float64(p.n)*maxDiff2*(1+plausTol)):
		return bad(fmt.Sprintf("square sums beyond what values within ±%g give", maxValue))
	case p.sdu2 != -1 && !(p.sdu2 >= 0 && p.sdd >= 0 && p.sdu2 <= float64(p.n)*(1+plausTol) &&
		p.sddu*p.sddu <= p.sdd*p.sdu2*(1+plausTol)+1e-300):
		return bad("serial-correlation sums impossible")
	}
	return nil
}

// Warm reads what Add reads (the windows, each ring's newest pane
// and its changed-marks) and returns a number of no meaning. Call it for
// a run of sensors before adding readings to them: the memory loads of
// different sensors then overlap, instead of each Add waiting on its own
// in turn when the sensors' windows do not fit the CPU caches. A pane
// spans three cache lines, so its first and last words are both read.
func (s *Sensor) Warm() uint64 {
	x := uint64(s.wins[0].ring)
	for j := range s.rings {
		rg := &s.rings[j]
		p := &rg.panes[rg.newSlot]
		x += uint64(p.n) + math.Float64bits(p.sdu2) + rg.dirty[0]
	}
	return x
}

// Closes reports, as a bit per window (bit i for window i), which windows
// would close their newest pane if a reading at t arrived: the moment to
// record their fit as history, before Add slides them.
func (s *Sensor) Closes(t int64) uint64 {
	var mask uint64
	for i := range s.wins {
		rg := &s.rings[s.wins[i].ring]
		if rg.start && t >= rg.nextAt && floorDiv(t, rg.width) > rg.newest {
			mask |= 1 << uint(i)
		}
	}
	return mask
}

// plausTol allows for rounding in sums that meet a bound exactly.
const plausTol = 1e-9

// momentsPlausible reports whether Σu, Σu², Σu³, Σu⁴ over n positions u
// in [0, 1) can be: 0 ≤ Σuᵏ ≤ n, up to rounding. NaN fails.
func momentsPlausible(n, su, su2, su3, su4 float64) bool {
	lo, hi := -n*plausTol, n*(1+plausTol)
	in := func(v float64) bool { return v >= lo && v <= hi }
	return in(su) && in(su2) && in(su3) && in(su4)
}

// spreadPlausible reports whether value sums over n readings can be:
// Σỹ² ≥ 0, (Σỹ)² ≤ n·Σỹ² and (Σuỹ)² ≤ Σu²·Σỹ² (Cauchy–Schwarz), all
// finite. NaN fails.
func spreadPlausible(n, sy, syy, su2, suy float64) bool {
	if !(syy >= 0) || math.IsInf(syy, 0) {
		return false
	}
	slack := (1 + plausTol)
	return sy*sy <= n*syy*slack+1e-300 && suy*suy <= su2*syy*slack+1e-300
}
