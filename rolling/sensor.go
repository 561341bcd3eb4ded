package rolling

import (
	"fmt"
	"math"
	"time"
)

// WindowSpec describes one sliding window: it holds the Span/Pane most
// recent panes of width Pane, aligned to the Unix epoch, ending with the
// pane of the newest reading seen. Span must be a whole multiple of Pane.
type WindowSpec struct {
	Span time.Duration
	Pane time.Duration
}

// Panes returns the count of panes the window holds.
func (ws WindowSpec) Panes() int { return int(ws.Span / ws.Pane) }

func (ws WindowSpec) validate() error {
	if ws.Pane <= 0 || ws.Span <= 0 {
		return fmt.Errorf("%w: span %v and pane %v must be positive", ErrBadSpec, ws.Span, ws.Pane)
	}
	if ws.Span%ws.Pane != 0 {
		return fmt.Errorf("%w: span %v is not a whole multiple of pane %v", ErrBadSpec, ws.Span, ws.Pane)
	}
	return nil
}

// MaxValue is the largest magnitude of a value Sensor.Add accepts.
//
// The pane sums that grow fastest are the squares of differences, Σỹ²
// with ỹ = y − y0 (the pane's first value) and Σd² over consecutive
// readings: each term is at most (2·MaxValue)² = 4e290, and a pane holds
// fewer than 2³² readings, so every pane sum stays below 1.8e300, inside
// float64's range (1.8e308) with a factor 10⁸ to spare for the window
// totals Solve forms over many panes. The log sums need no bound: ln y of
// a finite positive float64 lies within [−745, 710]. A value of 1e200,
// whose square overflows, would otherwise make a pane unrestorable.
const MaxValue = 1e145

const (
	maxValue = MaxValue
	maxDiff2 = 4 * maxValue * maxValue // largest (y − y0)² and d²
)

type window struct {
	spec  WindowSpec
	ring  int   // index into Sensor.rings
	panes int64 // Span/Pane
	late  uint64
}

// Sensor keeps the windows of one sensor and fits them on demand.
// Windows with the same pane width share one ring of panes.
//
// A Sensor is not safe for concurrent use; give each sensor one owner.
type Sensor struct {
	rings []ring
	wins  []window
	saved bool // MarkSaved was called
}

// NewSensor returns a sensor with the given windows, in that order; the
// window index used by the other methods is the position in specs.
func NewSensor(specs ...WindowSpec) (*Sensor, error) {
	if len(specs) == 0 {
		return nil, fmt.Errorf("%w: no windows", ErrBadSpec)
	}
	s := &Sensor{wins: make([]window, len(specs))}
	slots := map[time.Duration]int{}
	order := []time.Duration{}
	for i, ws := range specs {
		if err := ws.validate(); err != nil {
			return nil, err
		}
		if _, ok := slots[ws.Pane]; !ok {
			order = append(order, ws.Pane)
		}
		slots[ws.Pane] = max(slots[ws.Pane], ws.Panes())
		s.wins[i] = window{spec: ws, panes: int64(ws.Panes())}
	}
	s.rings = make([]ring, len(order))
	for j, w := range order {
		s.rings[j] = newRing(int64(w), slots[w])
		s.rings[j].minPanes = int64(slots[w])
		for i := range s.wins {
			if s.wins[i].spec.Pane == w {
				s.wins[i].ring = j
				s.rings[j].minPanes = min(s.rings[j].minPanes, s.wins[i].panes)
			}
		}
	}
	return s, nil
}

// Windows returns the count of windows.
func (s *Sensor) Windows() int { return len(s.wins) }

// Spec returns the spec of window i.
func (s *Sensor) Spec(i int) WindowSpec { return s.wins[i].spec }

// Late returns how many readings window i has turned away because their
// pane was already older than the window when they arrived.
func (s *Sensor) Late(i int) uint64 { return s.wins[i].late }

// Add folds one reading into every window of the sensor in O(1).
//
// A reading whose pane is older than a window is not part of that window
// and is counted in Late. Add returns ErrTooOld when no window took the
// reading, ErrNonFinite for a NaN or infinite value, ErrOutOfRange for a
// value beyond ±MaxValue; in each case nothing was stored.
func (s *Sensor) Add(r Reading) error {
	y := r.Value
	if math.IsNaN(y) || math.IsInf(y, 0) {
		return ErrNonFinite
	}
	if !(math.Abs(y) <= maxValue) {
		return &RangeError{Value: y}
	}
	pos := y > 0
	var ly float64
	if pos {
		ly = math.Log(y)
	}
	taken := false
	for j := range s.rings {
		rg := &s.rings[j]
		// Most readings fall in the newest pane: skip the division then.
		k := rg.newest
		if d := r.UnixNano - k*rg.width; !rg.start || d < 0 || d >= rg.width {
			k = floorDiv(r.UnixNano, rg.width)
		}
		if rg.start && k <= rg.newest-rg.minPanes {
			// Count lateness against each window before the ring may
			// slide: a window only turns a reading away when the reading
			// is older than the window as it already stands.
			for i := range s.wins {
				w := &s.wins[i]
				if w.ring == j && k <= rg.newest-w.panes {
					w.late++
				}
			}
		}
		if !rg.accepts(k) {
			continue
		}
		if err := rg.add(r.UnixNano, k, y, ly, pos); err != nil {
			return err
		}
		taken = true
	}
	if !taken {
		return ErrTooOld
	}
	return nil
}

// Newest returns the time of the newest reading held by window i, and
// false when the window is empty.
func (s *Sensor) Newest(i int) (time.Time, bool) {
	w := &s.wins[i]
	rg := &s.rings[w.ring]
	if !rg.start {
		return time.Time{}, false
	}
	p := &rg.panes[rg.newSlot]
	return time.Unix(0, p.tmax), p.n > 0
}
