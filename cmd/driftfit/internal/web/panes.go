package web

import (
	"math"
	"strconv"
	"time"

	"driftfit/rolling"
)

// PaneView is one pane of the readings behind a window's fit: when it
// ran, how many readings it holds and their mean, with the fitted
// model's mean over the same readings and the difference. Readings are
// not stored one by one; their panes are what the state keeps.
type PaneView struct {
	Start time.Time `json:"start"`
	End   time.Time `json:"end"`
	// T is the mean time of the readings (for the exp model, of those
	// with y > 0): where the chart draws the mean.
	T    time.Time `json:"t"`
	N    int       `json:"n"`
	Mean float64   `json:"mean"`
	// GeoMean and NPos, for the exp model only: exp of the mean ln y
	// over the NPos readings with y > 0, the mean the exp fit goes
	// through.
	GeoMean *float64 `json:"geo_mean,omitempty"`
	NPos    *int     `json:"n_pos,omitempty"`
	// Fit is the mean of the fitted model over the pane's readings (exp:
	// exp of the fitted ln y at their mean time); Resid = Mean − Fit, the
	// mean of the readings' residuals (exp: ln GeoMean − ln Fit). Both
	// nil when the fit is not usable.
	Fit   *float64 `json:"fit"`
	Resid *float64 `json:"resid"`
	// InFit says the pane's readings are the ones the fit record holds
	// of it; a pane newer than the record, or one that took late
	// readings since, is not.
	InFit bool `json:"in_fit"`
}

// panesOf returns the panes of the width of window sol.Window that s,
// the sensor's stored state, holds with readings at or before asof,
// from the first of the record sol's window on, oldest first, with the
// residuals against f, the fit of sol shown. note says what of the
// record's readings is not there and why; empty when all is.
func (h *handler) panesOf(s *rolling.Sensor, sol *rolling.Solution, f *rolling.Fit, asof time.Time) (ps []PaneView, note string) {
	ps = []PaneView{}
	if s == nil {
		return ps, "no readings are stored for this sensor"
	}
	w := sol.Window
	held := s.AppendPanes(nil, w.Pane)
	if len(held) == 0 {
		return ps, "the stored state keeps no panes of " + w.Pane.String()
	}
	// The record's window: its panes end with that of its newest reading.
	var recFrom, recTo time.Time
	if sol.N > 0 {
		// Panes are aligned to the Unix epoch (rolling), not to
		// time.Time's zero, which Truncate uses.
		last, pw := sol.Last.UnixNano(), int64(w.Pane)
		k := last / pw
		if last%pw < 0 {
			k--
		}
		recTo = time.Unix(0, (k+1)*pw)
		recFrom = recTo.Add(-w.Span)
	}
	var inFitN int
	var oldestIn time.Time
	for _, p := range held {
		if p.Last.After(asof) || !p.End.After(recFrom) {
			continue // readings after the time asked for, or before the record's window
		}
		v := PaneView{Start: p.Start, End: p.End, T: p.MeanTime, N: p.N, Mean: p.Mean}
		v.InFit = sol.N > 0 && !p.Start.Before(recFrom) && p.End.Compare(recTo) <= 0 &&
			!p.First.Before(sol.First) && !p.Last.After(sol.Last)
		if v.InFit {
			inFitN += p.N
			if oldestIn.IsZero() {
				oldestIn = p.Start
			}
		}
		if f.Model == rolling.Exp {
			np := p.NPos
			v.NPos = &np
			if np > 0 {
				v.T = p.MeanTimePos
				v.GeoMean = finite(math.Exp(p.LogMean))
			}
		}
		if f.OK() {
			c := &f.Coef
			switch tau := days(v.T.Sub(f.Last)); f.Model {
			case rolling.Exp:
				if p.NPos > 0 {
					ln := c[0] + c[1]*tau
					v.Fit, v.Resid = finite(math.Exp(ln)), finite(p.LogMean-ln)
				}
			default:
				// The mean of c0 + c1·τ + c2·τ² over the readings:
				// c0 + c1·τ̄ + c2·(τ̄² + σ²).
				sd := days(p.TimeSD)
				fit := c[0] + c[1]*tau + c[2]*(tau*tau+sd*sd)
				v.Fit, v.Resid = finite(fit), finite(p.Mean-fit)
			}
		}
		ps = append(ps, v)
	}
	switch {
	case sol.N == 0:
	case inFitN == 0:
		note = "readings are kept for the current window only: none of this fit's panes is kept any more"
	case sol.First.Before(oldestIn):
		note = "readings are kept for the current window only: this fit's panes before " + h.fmtTime(oldestIn) + " are gone"
	case inFitN != sol.N:
		note = "the kept panes of this fit hold " + strconv.Itoa(inFitN) + " readings, the fit " + strconv.Itoa(sol.N) +
			": readings that came late since are in the panes, not in the fit"
	}
	return ps, note
}
