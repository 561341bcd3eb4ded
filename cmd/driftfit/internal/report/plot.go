package report

import (
	"io"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/chart"
	"driftfit/rolling"
)

// Annotations are what a picture of fit history draws besides the fits:
// the tolerance band around the as-left value, the limits, and the
// alerts, tickets and calibrations on the same time axis. Values are in
// the sensor's unit, rates per day, curvatures per day².
type Annotations struct {
	// Class names the sensor's class ("" when unknown), for the title.
	Class string
	// Tolerance is the half-width of the tolerance band; 0: unknown, no
	// band (an as-left line is still drawn).
	Tolerance float64
	// AsLeft are the centres of the band, each in force from its Since
	// on until the next one's, in time order.
	AsLeft []AsLeft
	Limits Limits
	// Trend is the model whose level the level panel shows and the band
	// is judged against: Line (also for the zero value) or Parabola.
	Trend rolling.Model
	// Models are the fits the class judges. The level and slope panels
	// are always drawn; Parabola adds the curvature panel, Exp the
	// growth-rate panel.
	Models []rolling.Model
	// Events, Tickets and Calibrations of the sensor; the picture keeps
	// those on its time axis. An event is drawn in the column of its
	// window, or in every column when it has none. A calibration that
	// stands (chart.Calibration.Stands) is drawn with a rule across the
	// panels; a voided one as a struck ring, named in the legend with
	// when and why; a corrected one not at all (its correction is).
	Events       []alert.Event
	Tickets      []alert.Ticket
	Calibrations []chart.Calibration
	// Notes are said in the legend as they are.
	Notes []string
}

// AsLeft is one centre of the tolerance band and where it comes from.
type AsLeft struct {
	Value float64
	// Since is when it took effect; zero: before the first record.
	Since time.Time
	// Source says where the value comes from, for the legend:
	// "calibration 2026-11-20", "configuration", "ticket", "first judged
	// fit 2026-11-05 06:00".
	Source string
}

// Limits are alert limits in the sensor's unit: slope per day,
// curvature per day², doubling times. Zero: not set.
type Limits struct {
	SlopeWarning, SlopeCritical         float64
	CurvatureWarning, CurvatureCritical float64
	DoublingWarning, DoublingCritical   time.Duration
}

// plotSeries is the fit history of one window, in record order.
type plotSeries struct {
	label string
	spec  rolling.WindowSpec
	pts   []plotPoint
}

// plotPoint is one record: its time, its window's coverage and the
// three fits' coefficients with their 95% intervals.
type plotPoint struct {
	t    float64 // Unix seconds
	fits [3]plotFit
}

// plotFit is one model's fit of a record; ok is false for a record
// without a usable fit, which breaks that model's curves.
type plotFit struct {
	ok   bool
	coef [3]float64
	ci   [3][2]float64
}

// fitIndex is the slot of a model in plotPoint.fits.
func fitIndex(m rolling.Model) int {
	switch m {
	case rolling.Parabola:
		return 1
	case rolling.Exp:
		return 2
	}
	return 0
}

// picture draws fit history: per window a column of panels (level, drift
// rate, and curvature or growth rate when the class judges them) over
// one time axis, with the tolerance band, limits and event markers. It
// keeps one point per record and draws on Close.
type picture struct {
	unsupported
	w      io.Writer
	o      Options
	svg    bool
	sensor string
	series []plotSeries
}

func newPNG(w io.Writer, o Options) Writer { return &picture{w: w, o: o} }
func newSVG(w io.Writer, o Options) Writer { return &picture{w: w, o: o, svg: true} }

// Fit adds the fits of sol to the series of its window, whatever m: a
// record comes once per model, and the picture keeps it once.
func (p *picture) Fit(sensor, label string, sol *rolling.Solution, _ rolling.Model) error {
	if p.sensor == "" {
		p.sensor = sensor
	}
	i := 0
	for i < len(p.series) && p.series[i].label != label {
		i++
	}
	if i == len(p.series) {
		p.series = append(p.series, plotSeries{label: label, spec: sol.Window})
	}
	t := float64(sol.Last.UnixNano()) / 1e9
	if pts := p.series[i].pts; len(pts) > 0 && pts[len(pts)-1].t == t {
		return nil // the same record, another model
	}
	pt := plotPoint{t: t}
	for _, m := range []rolling.Model{rolling.Line, rolling.Parabola, rolling.Exp} {
		f := sol.Fit(m)
		pf := &pt.fits[fitIndex(m)]
		if pf.ok = f.OK(); pf.ok {
			pf.coef, pf.ci = f.Coef, f.CI
		}
	}
	p.series[i].pts = append(p.series[i].pts, pt)
	return nil
}

// Close draws the picture; ErrNothingToDraw when no record came.
func (p *picture) Close() error {
	if len(p.series) == 0 {
		return ErrNothingToDraw
	}
	from, to := p.series[0].pts[0].t, p.series[0].pts[0].t
	for _, s := range p.series {
		from, to = min(from, s.pts[0].t), max(to, s.pts[len(s.pts)-1].t)
	}
	var an *Annotations
	if p.o.Annotate != nil {
		var err error
		if an, err = p.o.Annotate(p.sensor, unixTime(from), unixTime(to)); err != nil {
			return err
		}
	}
	fig := buildFigure(p.sensor, p.o.unit(p.sensor), p.series, an)
	c, err := drawFigure(p.svg, fig)
	if err != nil {
		return err
	}
	_, err = c.WriteTo(p.w)
	return err
}

func unixTime(s float64) time.Time {
	return time.Unix(0, int64(s*1e9)).UTC()
}

func unixSeconds(t time.Time) float64 { return float64(t.UnixNano()) / 1e9 }
