package web

import (
	"fmt"
	"math"
	"strconv"
	"time"

	"driftfit/cmd/driftfit/internal/chart"
	"driftfit/rolling"
)

// Geometry of a window's chart of pane means, in SVG user units.
const (
	paneValTop  = 28
	paneValH    = 230
	paneResTop  = paneValTop + paneValH + 34
	paneResH    = 100
	paneAxisBot = paneResTop + paneResH
	paneChartH  = paneAxisBot + 34
	// paneCurveSamples of the fitted curve across the chart: smooth
	// enough for a parabola at page width.
	paneCurveSamples = 80
)

// svgPaneChart is one window's chart: the pane means of its readings
// with the fitted model and its 95% band through them, and the
// residuals beneath. Strings are SVG path data or numbers made here;
// titles are escaped by the template.
type svgPaneChart struct {
	ID, Window, Colour, Note, Caption string
	W, H                              int
	Panels                            []svgPanel
	XTicks                            []svgTick
	Bands                             []svgPath
	Lines                             []svgPath
	Dots                              []svgDot
	AsOfX                             float64
	AxisBottom, TimeLabel             float64
	Means, Residuals                  int // points drawn, for readers and tests
	// Empty, when not empty, is written across the panels: there are no
	// pane means to draw, and why. EmptyX, EmptyY and ResEmpty place it.
	Empty                    string
	EmptyX, EmptyY, ResEmpty float64
}

// svgDot is a point: a pane's mean or residual.
type svgDot struct {
	Class, Colour, Fill, Title string
	X, Y                       float64
	Data                       string // data-value
}

// paneCharts draws a chart per window with pane means.
func (h *handler) paneCharts(v *SensorView) []*svgPaneChart {
	var out []*svgPaneChart
	for i := range v.Windows {
		if c := h.paneChart(v, i, windowColours[i%len(windowColours)]); c != nil {
			out = append(out, c)
		}
	}
	return out
}

// paneChart draws window i of v, in colour. Its element ids end in i: a
// window's name holds a slash.
func (h *handler) paneChart(v *SensorView, i int, colour string) *svgPaneChart {
	wv := &v.Windows[i]
	id := strconv.Itoa(i)
	sol := &wv.sol
	f := sol.Fit(wv.model)
	if sol.N == 0 || f == nil {
		return nil
	}
	exp := wv.model == rolling.Exp
	c := &svgPaneChart{ID: "panes-" + id, Window: wv.Window, Colour: colour, Note: wv.PaneMeansNote, W: chartW, H: paneChartH,
		AxisBottom: paneAxisBot, TimeLabel: paneAxisBot + 22}

	// Time: the record's window, and on to the newest pane shown.
	w := sol.Window
	x1 := time.Unix(0, (sol.Last.UnixNano()/int64(w.Pane)+1)*int64(w.Pane))
	x0 := x1.Add(-w.Span)
	for _, p := range wv.PaneMeans {
		if p.End.After(x1) {
			x1 = p.End
		}
	}
	xs := scale{float64(x0.UnixNano()), float64(x1.UnixNano()), marginL, chartW - marginR}
	x := func(t time.Time) float64 { return xs.at(float64(t.UnixNano())) }

	// Values: the pane means and the fitted curve with its band over the
	// fit's readings set the axis.
	mean := func(p *PaneView) (float64, bool) {
		if exp {
			if p.GeoMean == nil {
				return 0, false
			}
			return *p.GeoMean, true
		}
		return p.Mean, true
	}
	var means, anchors, resids []float64
	for k := range wv.PaneMeans {
		p := &wv.PaneMeans[k]
		if m, ok := mean(p); ok {
			means = append(means, m)
		}
		if r, ok := residual(p, exp); ok {
			resids = append(resids, r)
		}
	}
	type sample struct {
		t         time.Time
		y, lo, hi float64
		after     bool
	}
	var curve []sample
	fitOK := f.OK() && !f.First.IsZero()
	if fitOK {
		from := f.First
		if from.Before(x0) {
			from = x0
		}
		for k := range paneCurveSamples + 1 {
			t := from.Add(time.Duration(float64(x1.Sub(from)) * float64(k) / paneCurveSamples))
			y, lo, hi := band(f, days(t.Sub(f.Last)))
			s := sample{t: t, y: y, lo: lo, hi: hi, after: t.After(f.Last)}
			curve = append(curve, s)
			if !s.after {
				anchors = append(anchors, y, lo, hi)
			}
		}
	}
	// Every pane mean is on the axis: each is a pane's worth of readings,
	// not one noisy record among many.
	lo, hi := chart.RobustRange(nil, append(means, anchors...))
	ys := scale{lo, hi, paneValTop + paneValH, paneValTop}
	unit := v.Unit
	if unit == "" {
		unit = "value"
	}
	what := "Pane means of the readings"
	if exp {
		what = "Pane geometric means of the readings"
	}
	val := svgPanel{ID: "values-" + id, Title: fmt.Sprintf("%s and the fitted %s, window %s", what, wv.Fit.Model, wv.Window),
		Top: paneValTop, Height: paneValH, ClipID: "clip-pv-" + id, Left: marginL, Width: chartW - marginL - marginR,
		Right: chartW - marginR, Bottom: paneValTop + paneValH, UnitLabel: unit, UnitLabelY: paneValTop + paneValH/2}
	for _, t := range niceTicks(lo, hi, 5) {
		val.YTicks = append(val.YTicks, svgTick{Pos: ys.at(t), Label: fmtNum(t)})
	}

	// Residuals: an axis symmetric about zero.
	rmax := 0.0
	if len(resids) > 0 {
		rlo, rhi := chart.RobustRange(nil, append(resids, 0))
		rmax = max(math.Abs(rlo), math.Abs(rhi))
	}
	if !(rmax > 0) {
		rmax = 1
	}
	rs := scale{-rmax, rmax, paneResTop + paneResH, paneResTop}
	runit, rtitle := unit, "Residuals: pane mean − fitted mean over the pane's readings"
	if exp {
		runit, rtitle = "% of fitted", "Residuals: pane geometric mean against the fitted value, %"
	}
	res := svgPanel{ID: "resid-" + id, Title: rtitle, Top: paneResTop, Height: paneResH, ClipID: "clip-pr-" + id,
		Left: marginL, Width: chartW - marginL - marginR, Right: chartW - marginR, Bottom: paneResTop + paneResH,
		UnitLabel: runit, UnitLabelY: paneResTop + paneResH/2, ZeroY: rs.at(0), HasZero: true}
	for _, t := range niceTicks(-rmax, rmax, 4) {
		res.YTicks = append(res.YTicks, svgTick{Pos: rs.at(t), Label: fmtNum(t)})
	}
	c.Panels = []svgPanel{val, res}

	ticks, step := timeTicks(x0, x1, h.o.Location)
	for _, t := range ticks {
		c.XTicks = append(c.XTicks, svgTick{Pos: x(t), Label: h.tickLabel(t, step)})
	}

	// The tolerance edges and the as-left value, where they fall inside
	// the axis (the pane means set it, not the band).
	if v.Band != nil {
		for k, e := range v.Band {
			edge := []string{"lower", "upper"}[k]
			c.Lines = append(c.Lines, svgPath{Class: "limit-line tolerance-edge", Colour: colourCritical, Clip: val.ClipID,
				D: fmt.Sprintf("M%s %s H%s", num(marginL), num(ys.at(e)), num(chartW-marginR)), Data: fmtNum(e),
				Title: fmt.Sprintf("%s tolerance edge %s %s", edge, fmtNum(e), v.Unit)})
		}
		c.Lines = append(c.Lines, svgPath{Class: "as-left", Colour: colourBand, Clip: val.ClipID,
			D: fmt.Sprintf("M%s %s H%s", num(marginL), num(ys.at(v.AsLeft.Value)), num(chartW-marginR)), Data: fmtNum(v.AsLeft.Value),
			Title: fmt.Sprintf("as-left %s %s (%s)", fmtNum(v.AsLeft.Value), v.Unit, v.AsLeft.Source)})
	}

	if fitOK {
		var bx, blo, bhi, fx, fy, ax, ay []float64
		for k, s := range curve {
			bx, blo, bhi = append(bx, x(s.t)), append(blo, ys.at(s.lo)), append(bhi, ys.at(s.hi))
			if !s.after {
				fx, fy = append(fx, x(s.t)), append(fy, ys.at(s.y))
			}
			if s.after || k+1 < len(curve) && curve[k+1].after {
				ax, ay = append(ax, x(s.t)), append(ay, ys.at(s.y))
			}
		}
		title := fmt.Sprintf("%s fit, window %s, record %s", wv.Fit.Model, wv.Window, h.fmtTime(wv.Record))
		c.Bands = append(c.Bands, svgPath{Class: "fit-band", Colour: colour, Window: wv.Window, Clip: val.ClipID,
			D: area(bx, blo, bhi), Title: "95% confidence band of the fitted mean, " + title})
		c.Lines = append(c.Lines, svgPath{Class: "fit-line", Colour: colour, Window: wv.Window, Clip: val.ClipID,
			D: polyline(fx, fy), Title: title, Data: fmtNum(wv.Fit.Coef[0])})
		if len(ax) > 1 {
			c.Lines = append(c.Lines, svgPath{Class: "fit-ahead", Colour: colour, Window: wv.Window, Clip: val.ClipID,
				D: polyline(ax, ay), Title: "the " + title + ", after its newest reading"})
		}
	}

	for k := range wv.PaneMeans {
		p := &wv.PaneMeans[k]
		m, ok := mean(p)
		if !ok {
			continue
		}
		fill, cls := colour, "pane-mean"
		if !p.InFit {
			fill, cls = "#ffffff", "pane-mean not-in-fit"
		}
		span := h.fmtTime(p.Start) + " – " + h.tickLabel(p.End, time.Hour)
		title := fmt.Sprintf("pane %s: %d readings, mean %s %s", span, p.N, fmtNum(p.Mean), v.Unit)
		if exp {
			title = fmt.Sprintf("pane %s: %d readings (%d above 0), geometric mean %s %s", span, p.N, *p.NPos, fmtNum(m), v.Unit)
		}
		if p.Fit != nil {
			title += fmt.Sprintf("; fitted %s", fmtNum(*p.Fit))
		}
		if !p.InFit {
			title += "; not in this fit"
		}
		c.Lines = append(c.Lines, svgPath{Class: "pane-span", Colour: colour, Window: wv.Window, Clip: val.ClipID,
			D: fmt.Sprintf("M%s %s H%s", num(x(p.Start)), num(ys.at(m)), num(x(p.End)))})
		c.Dots = append(c.Dots, svgDot{Class: cls, Colour: colour, Fill: fill, X: x(p.T), Y: ys.at(m), Title: title,
			Data: strconv.FormatFloat(m, 'g', -1, 64)})
		c.Means++
		if r, ok := residual(p, exp); ok {
			ry := rs.at(max(min(r, rmax), -rmax))
			c.Lines = append(c.Lines, svgPath{Class: "resid-stem", Colour: colour, Window: wv.Window, Clip: res.ClipID,
				D: fmt.Sprintf("M%s %s V%s", num(x(p.T)), num(rs.at(0)), num(ry))})
			rt := fmt.Sprintf("pane %s: residual %s %s", span, fmtNum(r), runit)
			c.Dots = append(c.Dots, svgDot{Class: "resid-point", Colour: colour, Fill: fill, X: x(p.T), Y: ry, Title: rt,
				Data: strconv.FormatFloat(r, 'g', -1, 64)})
			c.Residuals++
		}
	}
	if c.Means == 0 {
		c.Empty, c.EmptyX, c.EmptyY, c.ResEmpty = "No pane means to show", (marginL+chartW-marginR)/2, paneValTop+paneValH/2, paneResTop+paneResH/2
		if wv.PaneMeansNote != "" {
			c.Empty = "No pane means: " + wv.PaneMeansNote
		}
	}
	c.AsOfX = -1
	if !v.AsOf.Before(x0) && !v.AsOf.After(x1) {
		c.AsOfX = x(v.AsOf)
	}
	c.Caption = "Dots: the mean of each pane's readings at their mean time, the bar across the pane; hollow: a pane not in the fit record shown. " +
		"Line and shading: the fitted model of the newest fit record and the 95% confidence band of its mean; dashed after its newest reading."
	if exp {
		c.Caption = "Dots: the geometric mean of each pane's positive readings (the mean the exp fit goes through) at their mean time; hollow: a pane not in the fit record shown. " +
			"Line and shading: the fitted exp model and the 95% confidence band of its mean; dashed after its newest reading. Residuals as a percentage of the fitted value."
	}
	return c
}

// residual is a pane's residual as the chart draws it: in the unit of y,
// or for the exp model the geometric mean's excess over the fitted
// value in percent.
func residual(p *PaneView, exp bool) (float64, bool) {
	if p.Resid == nil {
		return 0, false
	}
	if exp {
		return 100 * math.Expm1(*p.Resid), true
	}
	return *p.Resid, true
}
