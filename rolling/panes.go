package rolling

import (
	"math"
	"time"
)

// PaneStats describes the readings of one pane in their own units: what
// a window keeps of them, since readings are not kept one by one.
type PaneStats struct {
	// Start and End bound the pane: it holds the readings with
	// Start ≤ t < End.
	Start, End time.Time
	// First and Last are the times of its earliest and latest reading.
	First, Last time.Time
	// N counts its readings, Mean is their mean value and MeanTime their
	// mean time; TimeSD is the standard deviation of their times
	// (population, divisor N), so that the mean of a fitted curve over
	// the pane's readings follows: for c0 + c1·τ + c2·τ² it is
	// c0 + c1·τ̄ + c2·(τ̄² + σ²) with τ̄ and σ from MeanTime and TimeSD.
	N        int
	Mean     float64
	MeanTime time.Time
	TimeSD   time.Duration
	// NPos counts the readings with y > 0, those the exp fit takes;
	// LogMean is the mean of their ln y and MeanTimePos their mean time.
	// Both are zero when NPos is 0.
	NPos        int
	LogMean     float64
	MeanTimePos time.Time
}

// AppendPanes appends to dst the panes of width w that the sensor holds
// with readings, oldest first, and returns the extended slice: those of
// its longest window of that width, which hold every shorter one's.
// Window i's panes, those Solve fits, are the ones with
// End > newest End − Span. A width no window has appends nothing.
//
// The pane sums hold values relative to the pane's first value and times
// as positions after its earliest reading (see pane); here they are
// turned back into means in the readings' own units and times, which
// costs one rounding each, far below any reading's resolution.
func (s *Sensor) AppendPanes(dst []PaneStats, w time.Duration) []PaneStats {
	rg := s.ringOf(w)
	if rg == nil || !rg.start {
		return dst
	}
	width := float64(rg.width)
	for k := rg.newest - int64(len(rg.panes)) + 1; k <= rg.newest; k++ {
		j := rg.slot(k)
		p := &rg.panes[j]
		if p.n == 0 {
			continue
		}
		n := float64(p.n)
		mu := p.su / n
		ps := PaneStats{
			Start: time.Unix(0, k*rg.width), End: time.Unix(0, (k+1)*rg.width),
			First: time.Unix(0, p.tmin), Last: time.Unix(0, p.tmax),
			N: int(p.n), Mean: p.y0 + p.sy/n,
			MeanTime: time.Unix(0, p.tmin+int64(math.Round(mu*width))),
			TimeSD:   time.Duration(math.Round(width * math.Sqrt(max(p.su2/n-mu*mu, 0)))),
			NPos:     int(p.npos),
		}
		if p.npos > 0 {
			sup, _ := rg.posMoments(j)
			np := float64(p.npos)
			ps.LogMean = p.l0 + p.sl/np
			ps.MeanTimePos = time.Unix(0, p.tmin+int64(math.Round(sup/np*width)))
		}
		dst = append(dst, ps)
	}
	return dst
}
