package report

import (
	"image/color"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
	"gonum.org/v1/plot/vg/vgsvg"

	"driftfit/cmd/driftfit/internal/chart"
)

// Plot geometry. A 10-inch column for the first window is large enough
// to read on a screen or a printed page; each further window adds 7
// inches. The level panel is the tallest: the tolerance band and the
// trend are what a review reads first. 120 dpi makes a 1200-pixel-wide
// PNG for one window.
const (
	plotWidth     = 10 * vg.Inch
	plotColWidth  = 7 * vg.Inch
	headerHeight  = 0.75 * vg.Inch
	levelHeight   = 2.8 * vg.Inch
	rateHeight    = 1.9 * vg.Inch
	stripHeight   = 1.25 * vg.Inch
	minLegendRows = 3
	plotDPI       = 120
	panelGap      = vg.Inch / 8
	pagePadLeft   = vg.Inch / 8
	pagePadRight  = vg.Inch / 4
	columnGap     = vg.Inch / 2
	markerRadius  = 4.5
	curveWidth    = 1.5
	limitWidth    = 1.2
	bandTint      = 0.3  // estimate's 95% band: 30% of the curve colour
	toleranceTint = 0.22 // tolerance band: 22% of bluish green
)

var (
	curveColour = chart.RGBA(chart.Blue)
	curveBand   = chart.Tint(chart.Blue, bandTint)
	bandFill    = chart.Tint(chart.ToleranceColour, toleranceTint)
	asLeftCol   = chart.RGBA(chart.ToleranceColour)
	warnCol     = chart.RGBA(chart.WarningColour)
	critCol     = chart.RGBA(chart.CriticalColour)
	ticketCol   = chart.RGBA(chart.TicketColour)
	calCol      = chart.RGBA(chart.CalibrationColour)
	zeroCol     = color.Gray{Y: 0x40}
	gridCol     = color.Gray{Y: 0xdd}
)

// figureHeight is the page height for n value panels and a legend of
// rows rows.
func figureHeight(n, rows int) vg.Length {
	return headerHeight + levelHeight + vg.Length(n-1)*(rateHeight+panelGap) + panelGap + stripHeight + legendHeight(rows)
}

// drawFigure draws fig as PNG or SVG.
func drawFigure(svg bool, fig *figure) (vg.CanvasWriterTo, error) {
	cols := len(fig.cols)
	npanels := len(fig.cols[0].panels)
	width := plotWidth + vg.Length(cols-1)*plotColWidth
	rows := legendRows(legendEntries(fig), width)
	height := figureHeight(npanels, rows)
	var c vg.CanvasWriterTo = vgimg.PngCanvas{Canvas: vgimg.NewWith(vgimg.UseWH(width, height), vgimg.UseDPI(plotDPI))}
	if svg {
		// Embedded fonts make the SVG look like the PNG: a viewer
		// without Liberation fonts would substitute wider ones and push
		// the titles past the edge.
		c = vgsvg.NewWith(vgsvg.UseWH(width, height), vgsvg.EmbedFonts(true))
	}
	dc := draw.New(c)
	// An opaque page: the plots paint only their own areas, and a
	// transparent margin turns dark in a dark-themed viewer.
	dc.SetColor(color.White)
	dc.Fill(dc.Rectangle.Path())

	// Header: the sensor and what the page covers.
	title := plot.New().Title.TextStyle
	title.Font.Size = vg.Points(15)
	title.XAlign, title.YAlign = draw.XCenter, draw.YTop
	top := dc.Max.Y - vg.Inch/10
	dc.FillText(title, vg.Point{X: width / 2, Y: top}, EscapeID(fig.sensor)+"  ·  fit history")
	sub := title
	sub.Font.Size = vg.Points(11)
	dc.FillText(sub, vg.Point{X: width / 2, Y: top - vg.Points(20)}, fig.subtitle)

	colW := (width - pagePadLeft - pagePadRight - vg.Length(cols-1)*columnGap) / vg.Length(cols)
	for i, col := range fig.cols {
		x0 := dc.Min.X + pagePadLeft + vg.Length(i)*(colW+columnGap)
		if err := drawColumn(dc, fig, &col, x0, x0+colW, dc.Max.Y-headerHeight, dc.Min.Y+legendHeight(rows)); err != nil {
			return nil, err
		}
	}
	if err := drawLegend(dc, fig, width); err != nil {
		return nil, err
	}
	return c, nil
}

// drawColumn draws one window's panels and its marker strip between
// x0 and x1, from y1 down to y0, with the data areas aligned so that
// one time is one x position in every panel.
func drawColumn(dc draw.Canvas, fig *figure, col *column, x0, x1, y1, y0 vg.Length) error {
	var plots []*plot.Plot
	var areas []draw.Canvas
	y := y1
	for i := range col.panels {
		p, err := panelPlot(fig, &col.panels[i])
		if err != nil {
			return err
		}
		h := rateHeight
		if i == 0 {
			h = levelHeight
		}
		plots = append(plots, p)
		areas = append(areas, sub(dc, x0, x1, y-h, y))
		y -= h + panelGap
	}
	sp, err := stripPlot(fig, col)
	if err != nil {
		return err
	}
	plots = append(plots, sp)
	areas = append(areas, sub(dc, x0, x1, y0, y))
	// Align the data areas across: the widest left and right axis
	// margins of the column apply to every panel.
	var left, right vg.Length
	for i, p := range plots {
		da := p.DataCanvas(areas[i])
		left = max(left, da.Min.X-areas[i].Min.X)
		right = max(right, areas[i].Max.X-da.Max.X)
	}
	for i, p := range plots {
		da := p.DataCanvas(areas[i])
		a := areas[i]
		a.Min.X += left - (da.Min.X - areas[i].Min.X)
		a.Max.X -= right - (areas[i].Max.X - da.Max.X)
		p.Draw(a)
	}
	return nil
}

func sub(dc draw.Canvas, x0, x1, y0, y1 vg.Length) draw.Canvas {
	return draw.Canvas{Canvas: dc.Canvas, Rectangle: vg.Rectangle{Min: vg.Point{X: x0, Y: y0}, Max: vg.Point{X: x1, Y: y1}}}
}

func newPanel() *plot.Plot {
	p := plot.New()
	p.Title.TextStyle.Font.Size = vg.Points(12)
	p.X.Label.TextStyle.Font.Size = vg.Points(11)
	p.Y.Label.TextStyle.Font.Size = vg.Points(11)
	p.X.Tick.Label.Font.Size = vg.Points(10)
	p.Y.Tick.Label.Font.Size = vg.Points(10)
	grid := plotter.NewGrid()
	grid.Vertical.Color, grid.Horizontal.Color = gridCol, gridCol
	p.Add(grid)
	return p
}

func hLine(t0, t1, y float64, col color.Color, w vg.Length, dashes []vg.Length) (*plotter.Line, error) {
	l, err := plotter.NewLine(plotter.XYs{{X: t0, Y: y}, {X: t1, Y: y}})
	if err != nil {
		return nil, err
	}
	l.Color, l.Width, l.Dashes = col, w, dashes
	return l, nil
}

var (
	dashLimit = []vg.Length{vg.Points(6), vg.Points(3)}
	dashEdge  = []vg.Length{vg.Points(2), vg.Points(2)}
	dashZero  = []vg.Length{vg.Points(5), vg.Points(3)}
	dashCal   = []vg.Length{vg.Points(3), vg.Points(2)}
)

func lineStyle(k lineKind) (color.Color, vg.Length, []vg.Length) {
	switch k {
	case asLeftLine:
		return asLeftCol, vg.Points(curveWidth), nil
	case toleranceEdge:
		return critCol, vg.Points(limitWidth), dashEdge
	case warningLine:
		return warnCol, vg.Points(limitWidth), dashLimit
	case criticalLine:
		return critCol, vg.Points(limitWidth), dashLimit
	}
	return zeroCol, vg.Points(1), dashZero
}

// panelPlot builds one value panel: tolerance band, reference and limit
// lines, the estimate's band and curve, calibration rules and alerts.
func panelPlot(fig *figure, pn *panel) (*plot.Plot, error) {
	p := newPanel()
	p.Title.Text = pn.title
	p.Y.Label.Text = pn.ylabel
	p.X.Tick.Marker = unlabelled{dateTicks{}}
	for _, b := range pn.bands {
		poly, err := plotter.NewPolygon(plotter.XYs{{X: b.t0, Y: b.y0}, {X: b.t1, Y: b.y0}, {X: b.t1, Y: b.y1}, {X: b.t0, Y: b.y1}})
		if err != nil {
			return nil, err
		}
		poly.Color, poly.LineStyle.Width = bandFill, 0
		p.Add(poly)
	}
	for _, r := range pn.runs {
		if err := addBand(p, r); err != nil {
			return nil, err
		}
	}
	for _, h := range pn.hlines {
		col, w, d := lineStyle(h.kind)
		l, err := hLine(h.t0, h.t1, h.y, col, w, d)
		if err != nil {
			return nil, err
		}
		p.Add(l)
	}
	for _, t := range pn.vlines {
		l, err := plotter.NewLine(plotter.XYs{{X: t, Y: pn.lo}, {X: t, Y: pn.hi}})
		if err != nil {
			return nil, err
		}
		l.Color, l.Width, l.Dashes = calCol, vg.Points(1.2), dashCal
		p.Add(l)
	}
	for _, m := range pn.marks {
		if m.y < pn.lo || m.y > pn.hi || m.t < fig.from || m.t > fig.to {
			continue
		}
		s, err := markScatter(m)
		if err != nil {
			return nil, err
		}
		p.Add(s)
	}
	// Add widened the axes to every element; set them to the figure's.
	p.X.Min, p.X.Max = fig.from, fig.to
	p.Y.Min, p.Y.Max = pn.lo, pn.hi
	return p, nil
}

// addBand adds the 95% band of one run as a filled polygon and the
// estimate as a line on top of it. A run of one point shows as a dot.
func addBand(p *plot.Plot, run []curvePt) error {
	band := make(plotter.XYs, 0, 2*len(run))
	mid := make(plotter.XYs, 0, len(run))
	for _, c := range run {
		band = append(band, plotter.XY{X: c.t, Y: c.hi})
		mid = append(mid, plotter.XY{X: c.t, Y: c.v})
	}
	for i := len(run) - 1; i >= 0; i-- {
		band = append(band, plotter.XY{X: run[i].t, Y: run[i].lo})
	}
	poly, err := plotter.NewPolygon(band)
	if err != nil {
		return err
	}
	poly.Color = curveBand
	poly.LineStyle.Color, poly.LineStyle.Width = curveBand, vg.Points(0.5)
	p.Add(poly)
	l, sc, err := plotter.NewLinePoints(mid)
	if err != nil {
		return err
	}
	l.Color, l.Width = curveColour, vg.Points(curveWidth)
	p.Add(l)
	if len(run) == 1 {
		sc.Color, sc.Radius, sc.Shape = curveColour, vg.Points(2.5), draw.CircleGlyph{}
		p.Add(sc)
	}
	return nil
}

// stripPlot is the marker strip: alerts, tickets and calibrations in
// three rows on the time axis, which is labelled here.
func stripPlot(fig *figure, col *column) (*plot.Plot, error) {
	p := newPanel()
	p.X.Tick.Marker = dateTicks{}
	p.X.Label.Text = "time (UTC, " + yearRange(fig.from, fig.to) + ")"
	p.Y.Tick.Marker = plot.ConstantTicks([]plot.Tick{{Value: calibrationRow, Label: "calibrations"}, {Value: ticketRow, Label: "tickets"}, {Value: alertRow, Label: "alerts"}})
	for _, m := range col.strip {
		if m.kind == markCalibration {
			l, err := plotter.NewLine(plotter.XYs{{X: m.t, Y: 0}, {X: m.t, Y: stripRows}})
			if err != nil {
				return nil, err
			}
			l.Color, l.Width, l.Dashes = calCol, vg.Points(1.2), dashCal
			p.Add(l)
		}
	}
	for _, m := range col.strip {
		s, err := markScatter(m)
		if err != nil {
			return nil, err
		}
		p.Add(s)
	}
	p.X.Min, p.X.Max = fig.from, fig.to
	p.Y.Min, p.Y.Max = 0, stripRows
	return p, nil
}

// markStyle is the glyph of a marker: triangles up for raised alerts and
// down for ended ones, orange for warning and vermillion for critical;
// tickets blue (diamond opened, hollow square due, filled square
// closed); calibrations a bluish-green ring, struck through when voided.
func markStyle(m mark) draw.GlyphStyle {
	sev := warnCol
	if m.critical {
		sev = critCol
	}
	r := vg.Points(markerRadius)
	switch m.kind {
	case markRaised:
		return draw.GlyphStyle{Color: sev, Radius: r, Shape: upTriangle{}}
	case markEnded:
		return draw.GlyphStyle{Color: sev, Radius: r, Shape: downTriangle{}}
	case markTicketOpened:
		return draw.GlyphStyle{Color: ticketCol, Radius: r * 1.2, Shape: diamond{}}
	case markTicketDue:
		// gonum's SquareGlyph is the outline, BoxGlyph the filled one.
		return draw.GlyphStyle{Color: ticketCol, Radius: r, Shape: draw.SquareGlyph{}}
	case markTicketClosed:
		return draw.GlyphStyle{Color: ticketCol, Radius: r, Shape: draw.BoxGlyph{}}
	case markVoided:
		return draw.GlyphStyle{Color: calCol, Radius: r, Shape: struckRing{}}
	}
	return draw.GlyphStyle{Color: calCol, Radius: r, Shape: draw.RingGlyph{}}
}

func markScatter(m mark) (*plotter.Scatter, error) {
	s, err := plotter.NewScatter(plotter.XYs{{X: m.t, Y: m.y}})
	if err != nil {
		return nil, err
	}
	s.GlyphStyle = markStyle(m)
	return s, nil
}

// struckRing is a ring with a stroke through it, lower left to upper
// right: a calibration that was voided.
type struckRing struct{}

// DrawGlyph implements draw.GlyphDrawer.
func (struckRing) DrawGlyph(c *draw.Canvas, sty draw.GlyphStyle, pt vg.Point) {
	draw.RingGlyph{}.DrawGlyph(c, sty, pt)
	r := sty.Radius * 1.4
	c.StrokeLine2(draw.LineStyle{Color: sty.Color, Width: vg.Points(1)}, pt.X-r, pt.Y-r, pt.X+r, pt.Y+r)
}

// upTriangle is a filled triangle pointing up (draw.TriangleGlyph is
// an outline, too faint for a marker).
type upTriangle struct{}

// DrawGlyph implements draw.GlyphDrawer.
func (upTriangle) DrawGlyph(c *draw.Canvas, sty draw.GlyphStyle, pt vg.Point) {
	c.SetColor(sty.Color)
	r := sty.Radius
	var p vg.Path
	p.Move(vg.Point{X: pt.X - r, Y: pt.Y - r*0.75})
	p.Line(vg.Point{X: pt.X + r, Y: pt.Y - r*0.75})
	p.Line(vg.Point{X: pt.X, Y: pt.Y + r})
	p.Close()
	c.Fill(p)
}

// downTriangle is a filled triangle pointing down.
type downTriangle struct{}

// DrawGlyph implements draw.GlyphDrawer.
func (downTriangle) DrawGlyph(c *draw.Canvas, sty draw.GlyphStyle, pt vg.Point) {
	c.SetColor(sty.Color)
	r := sty.Radius
	var p vg.Path
	p.Move(vg.Point{X: pt.X - r, Y: pt.Y + r*0.75})
	p.Line(vg.Point{X: pt.X + r, Y: pt.Y + r*0.75})
	p.Line(vg.Point{X: pt.X, Y: pt.Y - r})
	p.Close()
	c.Fill(p)
}

// diamond is a filled square standing on a corner.
type diamond struct{}

// DrawGlyph implements draw.GlyphDrawer.
func (diamond) DrawGlyph(c *draw.Canvas, sty draw.GlyphStyle, pt vg.Point) {
	c.SetColor(sty.Color)
	r := sty.Radius
	var p vg.Path
	p.Move(vg.Point{X: pt.X, Y: pt.Y + r})
	p.Line(vg.Point{X: pt.X + r, Y: pt.Y})
	p.Line(vg.Point{X: pt.X, Y: pt.Y - r})
	p.Line(vg.Point{X: pt.X - r, Y: pt.Y})
	p.Close()
	c.Fill(p)
}

// glyphRow is a legend thumbnail of markers side by side.
type glyphRow []mark

// Thumbnail implements plot.Thumbnailer.
func (g glyphRow) Thumbnail(c *draw.Canvas) {
	step := (c.Max.X - c.Min.X) / vg.Length(len(g))
	y := (c.Min.Y + c.Max.Y) / 2
	for i, m := range g {
		c.DrawGlyphNoClip(markStyle(m), vg.Point{X: c.Min.X + step*(vg.Length(i)+0.5), Y: y})
	}
}

// legendEntry is one line of the legend: what it shows and its text.
type legendEntry struct {
	text   string
	thumbs []plot.Thumbnailer
}

// drawLegend explains, under the columns, every kind of element the
// figure holds, in columns as many entries deep as fit the width.
func drawLegend(dc draw.Canvas, fig *figure, width vg.Length) error {
	es := legendEntries(fig)
	if len(es) == 0 {
		return nil
	}
	// Columns of rows entries, each as wide as its longest text, placed
	// left to right; as few rows as fit the page's width.
	rows := legendRows(es, width)
	x0 := dc.Min.X + pagePadLeft
	for i := 0; i*rows < len(es); i++ {
		l := newLegend()
		var w vg.Length
		for _, e := range es[i*rows : min(len(es), (i+1)*rows)] {
			l.Add(e.text, e.thumbs...)
			w = max(w, l.TextStyle.Width(e.text))
		}
		w += l.ThumbnailWidth + vg.Points(8)
		l.Draw(sub(dc, x0, x0+w, dc.Min.Y+vg.Inch/10, dc.Min.Y+legendHeight(rows)-vg.Inch/8))
		x0 += w + legendGap
	}
	return nil
}

// legendEntries lists what the legend explains, in order.
func legendEntries(fig *figure) []legendEntry {
	lg := &fig.legend
	var es []legendEntry
	line := func(col color.Color, w vg.Length, d []vg.Length) plot.Thumbnailer {
		l := &plotter.Line{LineStyle: draw.LineStyle{Color: col, Width: w, Dashes: d}}
		return l
	}
	fill := func(col color.Color) plot.Thumbnailer {
		return &plotter.Polygon{Color: col}
	}
	glyph := func(ms ...mark) plot.Thumbnailer { return glyphRow(ms) }
	es = append(es, legendEntry{"fit estimate and its 95% confidence band", []plot.Thumbnailer{fill(curveBand), line(curveColour, vg.Points(curveWidth), nil)}})
	if lg.band {
		es = append(es, legendEntry{lg.bandText, []plot.Thumbnailer{fill(bandFill)}})
		es = append(es, legendEntry{"tolerance edges", []plot.Thumbnailer{line(critCol, vg.Points(limitWidth), dashEdge)}})
	}
	if lg.asLeft {
		es = append(es, legendEntry{lg.asLeftText, []plot.Thumbnailer{line(asLeftCol, vg.Points(curveWidth), nil)}})
	}
	if lg.warning {
		es = append(es, legendEntry{"warning limit", []plot.Thumbnailer{line(warnCol, vg.Points(limitWidth), dashLimit)}})
	}
	if lg.critical {
		es = append(es, legendEntry{"critical limit", []plot.Thumbnailer{line(critCol, vg.Points(limitWidth), dashLimit)}})
	}
	if lg.limitText != "" {
		es = append(es, legendEntry{"limits: " + lg.limitText, nil})
	}
	if lg.raised {
		es = append(es, legendEntry{"alert raised or escalated (warning, critical)", []plot.Thumbnailer{glyph(mark{kind: markRaised}, mark{kind: markRaised, critical: true})}})
	}
	if lg.ended {
		es = append(es, legendEntry{"alert cleared or reset", []plot.Thumbnailer{glyph(mark{kind: markEnded}, mark{kind: markEnded, critical: true})}})
	}
	if lg.opened || lg.due || lg.closed {
		var th glyphRow
		txt := "ticket"
		for _, k := range []struct {
			on   bool
			kind markKind
			name string
		}{{lg.opened, markTicketOpened, "opened"}, {lg.due, markTicketDue, "due"}, {lg.closed, markTicketClosed, "closed"}} {
			if k.on {
				th = append(th, mark{kind: k.kind})
				txt += " " + k.name + ","
			}
		}
		es = append(es, legendEntry{txt[:len(txt)-1], []plot.Thumbnailer{th}})
	}
	if lg.calibration {
		es = append(es, legendEntry{"calibration", []plot.Thumbnailer{line(calCol, vg.Points(1.2), dashCal), glyph(mark{kind: markCalibration})}})
	}
	if lg.voided {
		es = append(es, legendEntry{"voided calibration (each named in this legend)", []plot.Thumbnailer{glyph(mark{kind: markVoided})}})
	}
	for _, n := range lg.notes {
		es = append(es, legendEntry{n, nil})
	}
	if lg.offScale {
		es = append(es, legendEntry{"off the scale: records with a 95% interval over 4 times the median width, or beyond the 2nd–98th percentiles", nil})
	}
	return es
}

// legendGap separates the legend's columns.
const legendGap = 18 // vg.Length is in points

func newLegend() plot.Legend {
	l := plot.NewLegend()
	l.Top, l.Left = true, true
	l.TextStyle.Font.Size = vg.Points(10)
	l.ThumbnailWidth = vg.Points(34)
	l.Padding = vg.Points(3)
	return l
}

// legendRows returns the fewest rows per legend column, at least
// minLegendRows, whose columns fit in width.
func legendRows(es []legendEntry, width vg.Length) int {
	l := newLegend()
	for rows := minLegendRows; ; rows++ {
		total := pagePadLeft + pagePadRight
		for i := 0; i*rows < len(es); i++ {
			var w vg.Length
			for _, e := range es[i*rows : min(len(es), (i+1)*rows)] {
				w = max(w, l.TextStyle.Width(e.text))
			}
			total += w + l.ThumbnailWidth + vg.Points(8) + legendGap
		}
		if total <= width || rows >= len(es) {
			return rows
		}
	}
}

// legendHeight is the height of a legend of rows rows, with its margins.
func legendHeight(rows int) vg.Length {
	return vg.Length(rows)*vg.Points(15) + vg.Inch/4
}
