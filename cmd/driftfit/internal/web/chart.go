package web

import (
	"cmp"
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"
	"time"

	"driftfit/cmd/driftfit/internal/chart"
)

// Okabe–Ito colours (Okabe and Ito, "Color Universal Design", 2008),
// distinguishable with the common colour-vision deficiencies. Fills use
// them with opacity in the style sheet.
var windowColours = chart.WindowColours

const (
	colourWarning  = chart.WarningColour
	colourCritical = chart.CriticalColour
	colourBand     = chart.ToleranceColour
	colourTicket   = chart.TicketColour
	colourCal      = chart.CalibrationColour
)

// Chart geometry, in SVG user units.
const (
	chartW    = 1000
	marginL   = 84
	marginR   = 24
	levelTop  = 28
	levelH    = 300
	driftTop  = levelTop + levelH + 34
	driftH    = 150
	markerTop = driftTop + driftH + 30
	markerH   = 44
	chartH    = markerTop + markerH + 34
)

// svgChart is the sensor's chart, ready for the template: every string
// is SVG path data or a number, made here; titles are escaped there.
type svgChart struct {
	W, H                  int
	Panels                []svgPanel
	XTicks                []svgTick
	Bands                 []svgPath // tolerance band and fit bands
	Lines                 []svgPath // fit lines, history series, limits
	Markers               []svgMarker
	AsOfX                 float64
	Left, Right, StripW   float64
	MarkerTop, MarkerMid  float64
	AxisBottom, TimeLabel float64
	OffScale              int
}

type svgPanel struct {
	ID, Title   string
	Top, Height float64
	YTicks      []svgTick
	ClipID      string
	Left, Width float64
	Right       float64 // Left + Width
	Bottom      float64
	UnitLabel   string
	UnitLabelY  float64
	ZeroY       float64
	HasZero     bool
}

type svgTick struct {
	Pos   float64
	Label string
}

type svgPath struct {
	Class, Colour, D, Window, Title, Clip string
	Data                                  string // data-value for tests and readers
}

type svgMarker struct {
	Class, Colour, Shape, Title string
	X, Y                        float64
	Line                        bool // draw a thin vertical rule across the panels
}

type scale struct {
	d0, d1, r0, r1 float64
}

func (s scale) at(v float64) float64 { return s.r0 + (v-s.d0)/(s.d1-s.d0)*(s.r1-s.r0) }

func num(v float64) string { return strconv.FormatFloat(v, 'f', 1, 64) }

// polyline returns path data through the points, breaking the path at
// gaps (NaN).
func polyline(xs, ys []float64) string {
	var b strings.Builder
	pen := false
	for i := range xs {
		if math.IsNaN(ys[i]) || math.IsInf(ys[i], 0) {
			pen = false
			continue
		}
		if pen {
			b.WriteString(" L")
		} else {
			b.WriteString(" M")
		}
		b.WriteString(num(xs[i]) + " " + num(ys[i]))
		pen = true
	}
	return strings.TrimSpace(b.String())
}

// area returns a closed path between lo and hi over xs.
func area(xs, lo, hi []float64) string {
	if len(xs) == 0 {
		return ""
	}
	var b strings.Builder
	for i := range xs {
		if i == 0 {
			b.WriteString("M")
		} else {
			b.WriteString(" L")
		}
		b.WriteString(num(xs[i]) + " " + num(hi[i]))
	}
	for i := len(xs) - 1; i >= 0; i-- {
		b.WriteString(" L" + num(xs[i]) + " " + num(lo[i]))
	}
	return b.String() + " Z"
}

// buildChart draws the sensor's fits, history, band, limits and events
// on one time axis from v.From to v.To.
func (h *handler) buildChart(v *SensorView) *svgChart {
	c := &svgChart{W: chartW, H: chartH, Left: marginL, Right: chartW - marginR, StripW: chartW - marginL - marginR,
		MarkerTop: markerTop, MarkerMid: markerTop + markerH/2, AxisBottom: markerTop + markerH, TimeLabel: markerTop + markerH + 22}
	xs := scale{float64(v.From.UnixNano()), float64(v.To.UnixNano()), marginL, chartW - marginR}
	x := func(t time.Time) float64 { return xs.at(float64(t.UnixNano())) }
	in := func(t time.Time) bool { return !t.Before(v.From) && !t.After(v.To) }

	// Value panel: history levels are the noisy values; fitted curves,
	// the tolerance band and the as-left value are anchors.
	var levels, drifts, anchors []float64
	for _, r := range v.History {
		levels = append(levels, r.Level)
		drifts = append(drifts, r.Drift)
	}
	for _, w := range v.Windows {
		for i, p := range w.Curve {
			if i < w.Ahead && in(p.T) {
				anchors = append(anchors, p.Fit)
			}
		}
	}
	if v.Band != nil {
		anchors = append(anchors, v.Band[0], v.Band[1])
	}
	lo, hi := chart.RobustRange(levels, anchors)
	ys := scale{lo, hi, levelTop + levelH, levelTop}
	unit := v.Unit
	if unit == "" {
		unit = "value"
	}
	level := svgPanel{ID: "level", Title: "Level and fitted " + v.Model, Top: levelTop, Height: levelH, ClipID: "clip-level",
		Left: marginL, Width: chartW - marginL - marginR, Right: chartW - marginR, Bottom: levelTop + levelH, UnitLabel: unit, UnitLabelY: levelTop + levelH/2}
	for _, t := range niceTicks(lo, hi, 6) {
		level.YTicks = append(level.YTicks, svgTick{Pos: ys.at(t), Label: fmtNum(t)})
	}

	// Drift panel: the line fit's rate per record, and the slope limits.
	lim := v.Limits
	danchors := []float64{0}
	for _, l := range []float64{lim.SlopeWarning, lim.SlopeCritical} {
		if l > 0 {
			danchors = append(danchors, l, -l)
		}
	}
	dlo, dhi := chart.RobustRange(drifts, danchors)
	ds := scale{dlo, dhi, driftTop + driftH, driftTop}
	drift := svgPanel{ID: "drift", Title: "Drift rate of the line fit", Top: driftTop, Height: driftH, ClipID: "clip-drift",
		Left: marginL, Width: chartW - marginL - marginR, Right: chartW - marginR, Bottom: driftTop + driftH, UnitLabel: unit + "/day",
		UnitLabelY: driftTop + driftH/2, ZeroY: ds.at(0), HasZero: true}
	for _, t := range niceTicks(dlo, dhi, 4) {
		drift.YTicks = append(drift.YTicks, svgTick{Pos: ds.at(t), Label: fmtNum(t)})
	}
	c.Panels = []svgPanel{level, drift}

	ticks, step := timeTicks(v.From, v.To, h.o.Location)
	for _, t := range ticks {
		c.XTicks = append(c.XTicks, svgTick{Pos: x(t), Label: h.tickLabel(t, step)})
	}

	if v.Band != nil {
		y0, y1 := ys.at(v.Band[1]), ys.at(v.Band[0])
		c.Bands = append(c.Bands, svgPath{Class: "tolerance-band", Colour: colourBand, Clip: "clip-level",
			D:     fmt.Sprintf("M%s %s H%s V%s H%s Z", num(marginL), num(y0), num(chartW-marginR), num(y1), num(marginL)),
			Title: fmt.Sprintf("tolerance band %s to %s %s (as-left %s ± %s)", fmtNum(v.Band[0]), fmtNum(v.Band[1]), v.Unit, fmtNum(v.AsLeft.Value), fmtNum(v.Tolerance))})
		for i, e := range v.Band {
			edge := []string{"lower", "upper"}[i]
			c.Lines = append(c.Lines, svgPath{Class: "limit-line tolerance-edge", Colour: colourCritical, Clip: "clip-level",
				D: fmt.Sprintf("M%s %s H%s", num(marginL), num(ys.at(e)), num(chartW-marginR)), Data: fmtNum(e),
				Title: fmt.Sprintf("%s tolerance edge %s %s", edge, fmtNum(e), v.Unit)})
		}
		c.Lines = append(c.Lines, svgPath{Class: "as-left", Colour: colourBand, Clip: "clip-level",
			D: fmt.Sprintf("M%s %s H%s", num(marginL), num(ys.at(v.AsLeft.Value)), num(chartW-marginR)), Data: fmtNum(v.AsLeft.Value),
			Title: fmt.Sprintf("as-left %s %s (%s)", fmtNum(v.AsLeft.Value), v.Unit, v.AsLeft.Source)})
	}
	for _, l := range []struct {
		v     float64
		name  string
		class string
		col   string
	}{{lim.SlopeWarning, "warning", "limit-line slope-warning", colourWarning}, {lim.SlopeCritical, "critical", "limit-line slope-critical", colourCritical}} {
		if l.v <= 0 {
			continue
		}
		for _, sgn := range []float64{1, -1} {
			c.Lines = append(c.Lines, svgPath{Class: l.class, Colour: l.col, Clip: "clip-drift",
				D: fmt.Sprintf("M%s %s H%s", num(marginL), num(ds.at(sgn*l.v)), num(chartW-marginR)), Data: fmtNum(sgn * l.v),
				Title: fmt.Sprintf("slope %s level %s %s/day", l.name, fmtNum(sgn*l.v), v.Unit)})
		}
	}

	// History series per window, then the fits over their windows.
	byWindow := map[string][]HistoryRow{}
	var order []string
	for _, r := range v.History {
		if _, ok := byWindow[r.Window]; !ok {
			order = append(order, r.Window)
		}
		byWindow[r.Window] = append(byWindow[r.Window], r)
	}
	colour := map[string]string{}
	for i, w := range v.Windows {
		colour[w.Window] = windowColours[i%len(windowColours)]
	}
	// Longer windows are drawn last and heavier: their history is the
	// smoother one, and the short windows' noise should not hide it.
	spanOf := map[string]time.Duration{}
	for _, wv := range v.Windows {
		spanOf[wv.Window] = wv.spec.Span
	}
	slices.SortStableFunc(order, func(a, b string) int { return cmp.Compare(spanOf[a], spanOf[b]) })
	for k, w := range order {
		weight := "minor"
		if k == len(order)-1 {
			weight = "major"
		}
		if _, ok := colour[w]; !ok {
			colour[w] = windowColours[len(colour)%len(windowColours)]
		}
		rows := byWindow[w]
		px, py, pd := make([]float64, len(rows)), make([]float64, len(rows)), make([]float64, len(rows))
		for i, r := range rows {
			px[i], py[i], pd[i] = x(r.Time), ys.at(r.Level), ds.at(r.Drift)
			if r.Level < lo || r.Level > hi || r.Drift < dlo || r.Drift > dhi {
				c.OffScale++
			}
		}
		c.Lines = append(c.Lines,
			svgPath{Class: "history-level " + weight, Colour: colour[w], Window: w, Clip: "clip-level", D: polyline(px, py),
				Title: "level of the line fit at each pane close, window " + w},
			svgPath{Class: "history-drift " + weight, Colour: colour[w], Window: w, Clip: "clip-drift", D: polyline(px, pd),
				Title: "drift rate of the line fit at each pane close, window " + w})
	}
	for _, w := range v.Windows {
		if len(w.Curve) == 0 {
			continue
		}
		var fx, fy, flo, fhi []float64
		var ax, ay []float64
		for i, p := range w.Curve {
			if !in(p.T) {
				continue
			}
			if i < w.Ahead {
				fx, fy, flo, fhi = append(fx, x(p.T)), append(fy, ys.at(p.Fit)), append(flo, ys.at(p.Low)), append(fhi, ys.at(p.High))
			}
			if i >= w.Ahead-1 {
				ax, ay = append(ax, x(p.T)), append(ay, ys.at(p.Fit))
			}
		}
		title := fmt.Sprintf("%s fit, window %s, record %s: level %s %s", w.Fit.Model, w.Window, h.fmtTime(w.Record), fmtNum(w.Fit.Coef[0]), v.Unit)
		c.Bands = append(c.Bands, svgPath{Class: "fit-band", Colour: colour[w.Window], Window: w.Window, Clip: "clip-level",
			D: area(fx, flo, fhi), Title: "95% confidence band of the " + title})
		c.Lines = append(c.Lines, svgPath{Class: "fit-line", Colour: colour[w.Window], Window: w.Window, Clip: "clip-level",
			D: polyline(fx, fy), Title: title, Data: fmtNum(w.Fit.Coef[0])})
		if len(ax) > 1 {
			c.Lines = append(c.Lines, svgPath{Class: "fit-ahead", Colour: colour[w.Window], Window: w.Window, Clip: "clip-level",
				D: polyline(ax, ay), Title: "projection of the " + title})
		}
	}

	// Events on the marker strip, with a rule across the panels.
	for _, ev := range v.Events {
		if !in(ev.At) {
			continue
		}
		col, shape := colourWarning, "up"
		if ev.Severity.String() == "critical" {
			col = colourCritical
		}
		switch ev.Type.String() {
		case "cleared", "reset":
			shape = "down"
		}
		c.Markers = append(c.Markers, svgMarker{Class: "marker-alert", Colour: col, Shape: shape, X: x(ev.At), Y: markerTop + 12,
			Title: fmt.Sprintf("%s %s %s alert, window %s, %s: %s (limit %s) %s", ev.Type, ev.Severity, ev.Kind, ev.Window,
				h.fmtTime(ev.At), fmtNum(ev.Value), fmtNum(ev.Limit), ev.Unit)})
	}
	for _, tk := range v.Tickets {
		if in(tk.Opened) {
			c.Markers = append(c.Markers, svgMarker{Class: "marker-ticket", Colour: colourTicket, Shape: "diamond", X: x(tk.Opened), Y: markerTop + 32,
				Title: fmt.Sprintf("ticket %s opened %s (%s %s), due %s", tk.ID, h.fmtTime(tk.Opened), tk.Severity, tk.Reason, h.fmtTime(tk.Due))})
		}
		if in(tk.Due) {
			c.Markers = append(c.Markers, svgMarker{Class: "marker-due", Colour: colourTicket, Shape: "square", X: x(tk.Due), Y: markerTop + 32,
				Title: fmt.Sprintf("ticket %s due %s", tk.ID, h.fmtTime(tk.Due))})
		}
	}
	// A calibration that stands is a filled circle with a rule across
	// the panels; a voided one a struck ring without a rule; a corrected
	// one is not drawn, its correction is.
	for _, cal := range v.Calibrations {
		if !in(cal.Time) || !cal.Corrected.IsZero() {
			continue
		}
		title := "calibration"
		if cal.Seq > 0 {
			title += fmt.Sprintf(" no. %d", cal.Seq)
		}
		title += " " + h.fmtTime(cal.Time)
		if cal.AsLeft != nil {
			title += fmt.Sprintf(": as-found %s, as-left %s %s", fmtNum(*cal.AsFound), fmtNum(*cal.AsLeft), v.Unit)
		}
		if cal.Corrects > 0 {
			title += fmt.Sprintf("; corrects no. %d", cal.Corrects)
		}
		m := svgMarker{Class: "marker-cal", Colour: colourCal, Shape: "circle", X: x(cal.Time), Y: markerTop + 32, Line: true}
		if !cal.Voided.IsZero() {
			title += " — voided " + h.fmtTime(cal.Voided)
			if cal.Reason != "" {
				title += ": " + cal.Reason
			}
			m.Class, m.Shape, m.Line = "marker-cal-voided", "struck", false
		}
		m.Title = title
		c.Markers = append(c.Markers, m)
	}
	c.AsOfX = x(v.AsOf)
	if !in(v.AsOf) {
		c.AsOfX = -1
	}
	return c
}

// shapePoints returns polygon points of a marker centred at (x, y); for
// "struck", the path data of the stroke through its ring.
func shapePoints(shape string, x, y float64) string {
	const r = 6
	switch shape {
	case "down":
		return fmt.Sprintf("%s,%s %s,%s %s,%s", num(x-r), num(y-r), num(x+r), num(y-r), num(x), num(y+r))
	case "diamond":
		return fmt.Sprintf("%s,%s %s,%s %s,%s %s,%s", num(x), num(y-r), num(x+r), num(y), num(x), num(y+r), num(x-r), num(y))
	case "struck": // the stroke through a ring, as path data
		return fmt.Sprintf("M%s %s L%s %s", num(x-r-1), num(y+r+1), num(x+r+1), num(y-r-1))
	case "square":
		return fmt.Sprintf("%s,%s %s,%s %s,%s %s,%s", num(x-r+1), num(y-r+1), num(x+r-1), num(y-r+1), num(x+r-1), num(y+r-1), num(x-r+1), num(y+r-1))
	}
	return fmt.Sprintf("%s,%s %s,%s %s,%s", num(x-r), num(y+r), num(x+r), num(y+r), num(x), num(y-r))
}
