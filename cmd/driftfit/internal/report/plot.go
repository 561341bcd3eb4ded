package report

import (
	"fmt"
	"image/color"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"time"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
	"gonum.org/v1/plot/vg/vgsvg"

	"driftfit/configs"
	"driftfit/rolling"
)

// plotSeries is the line fit of one window over time, in record order.
type plotSeries struct {
	label string
	pts   []plotPoint
}

// plotPoint is one record's line fit: level c0 and rate c1 with their
// 95% intervals. ok is false for a record without a usable fit, which
// breaks the curves.
type plotPoint struct {
	t               float64 // Unix seconds
	ok              bool
	settled         bool // at least half the window's panes hold readings
	level, rate     float64
	levelCI, rateCI [2]float64
}

// picture draws fit history: per window, the line fit's level and drift
// rate over time with their 95% bands. It keeps one point per record and
// draws on Close.
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

// Fit adds sol's line fit to the series of its window, whatever m: the
// picture shows the line fit, once per record.
func (p *picture) Fit(sensor, label string, sol *rolling.Solution, _ rolling.Model) error {
	if p.sensor == "" {
		p.sensor = sensor
	}
	i := 0
	for i < len(p.series) && p.series[i].label != label {
		i++
	}
	if i == len(p.series) {
		p.series = append(p.series, plotSeries{label: label})
	}
	t := float64(sol.Last.UnixNano()) / 1e9
	if pts := p.series[i].pts; len(pts) > 0 && pts[len(pts)-1].t == t {
		return nil // the same record, another model
	}
	f := &sol.Line
	pt := plotPoint{t: t, ok: f.OK(), settled: sol.Coverage() >= settledCoverage}
	if pt.ok {
		pt.level, pt.levelCI = f.Coef[0], f.CI[0]
		pt.rate, pt.rateCI = f.Coef[1], f.CI[1]
	}
	p.series[i].pts = append(p.series[i].pts, pt)
	return nil
}

// Close draws the picture; ErrNothingToDraw when no record came.
func (p *picture) Close() error {
	if len(p.series) == 0 {
		return ErrNothingToDraw
	}
	c, err := drawHistory(p.svg, p.sensor, p.o.unit(p.sensor), p.series)
	if err != nil {
		return err
	}
	_, err = c.WriteTo(p.w)
	return err
}

// settledCoverage is the fraction of a window's panes that must hold
// readings for its fit to set the plot's vertical scale. While a window
// fills after a start, its few readings give rates and bands many times
// wider than later ones (a 1-day line fit of a daily swing is ±10 units
// per day), and scaling to them flattens the weeks that matter into a
// line; those first records run off the scale instead, and the panel
// says so.
const settledCoverage = 0.5

// Plot geometry. 10 × 7 in for one window is large enough to read on a
// screen or a printed page; each further window adds a column. 120 dpi
// makes a 1200-pixel-wide PNG.
const (
	plotWidth    = 10 * vg.Inch
	plotColWidth = 7 * vg.Inch
	plotHeight   = 7 * vg.Inch
	plotDPI      = 120
)

var (
	levelColour = color.RGBA{R: 0x1f, G: 0x5f, B: 0xa8, A: 0xff}
	rateColour  = color.RGBA{R: 0xb0, G: 0x40, B: 0x10, A: 0xff}
	// Bands are the curve's colour, light and opaque, so the grid stays
	// visible and PNG and SVG look the same.
	levelBand = color.RGBA{R: 0xc4, G: 0xd8, B: 0xf0, A: 0xff}
	rateBand  = color.RGBA{R: 0xf4, G: 0xd2, B: 0xc0, A: 0xff}
	zeroLine  = color.Gray{Y: 0x40}
)

// drawHistory draws the series as PNG or SVG: per window a column with
// the level above and the drift rate below, both against time. unit
// labels the axes ("" for unknown).
func drawHistory(svg bool, sensor, unit string, series []plotSeries) (vg.CanvasWriterTo, error) {
	if unit == "" {
		unit = "value"
	}
	cols := len(series)
	width := plotWidth + vg.Length(cols-1)*plotColWidth
	var c vg.CanvasWriterTo = vgimg.PngCanvas{Canvas: vgimg.NewWith(vgimg.UseWH(width, plotHeight), vgimg.UseDPI(plotDPI))}
	if svg {
		// Embedded fonts make the SVG look like the PNG: a viewer
		// without Liberation fonts would substitute wider ones and push
		// the titles past the edge.
		c = vgsvg.NewWith(vgsvg.UseWH(width, plotHeight), vgsvg.EmbedFonts(true))
	}
	plots := [][]*plot.Plot{make([]*plot.Plot, cols), make([]*plot.Plot, cols)}
	for i, s := range series {
		top, bottom, err := seriesPlots(EscapeID(sensor), unit, s)
		if err != nil {
			return nil, err
		}
		plots[0][i], plots[1][i] = top, bottom
	}
	dc := draw.New(c)
	// An opaque page: the plots paint only their own areas, and a
	// transparent margin turns dark in a dark-themed viewer.
	dc.SetColor(color.White)
	dc.Fill(dc.Rectangle.Path())
	tiles := draw.Tiles{
		Rows: 2, Cols: cols,
		PadX: vg.Inch / 2, PadY: vg.Inch / 4,
		PadTop: vg.Inch / 8, PadBottom: vg.Inch / 8, PadLeft: vg.Inch / 8, PadRight: vg.Inch / 4,
	}
	canvases := plot.Align(plots, tiles, dc)
	for j := range plots {
		for i := range plots[j] {
			plots[j][i].Draw(canvases[j][i])
		}
	}
	return c, nil
}

// seriesPlots builds the level and rate panels of one window.
func seriesPlots(sensor, unit string, s plotSeries) (top, bottom *plot.Plot, err error) {
	top, bottom = newPanel(), newPanel()
	top.Title.Text = fmt.Sprintf("%s  ·  window %s  ·  line fit with 95%% confidence band", sensor, s.label)
	top.Y.Label.Text = fmt.Sprintf("level (%s)", unit)
	bottom.Y.Label.Text = fmt.Sprintf("drift rate (%s/day)", unit)

	lo, hi := s.pts[0].t, s.pts[len(s.pts)-1].t
	bottom.X.Label.Text = "time (UTC, " + yearRange(lo, hi) + ")"
	// Both panels share the time axis, so the upper one needs no labels.
	top.X.Tick.Marker, bottom.X.Tick.Marker = unlabelled{dateTicks{}}, dateTicks{}
	for _, p := range []*plot.Plot{top, bottom} {
		p.X.Min, p.X.Max = lo, hi
	}

	runs := okRuns(s.pts)
	if len(runs) == 0 {
		// Every record failed to fit (too few readings): draw the empty
		// frame with its title and the zero line rather than nothing.
		top.Y.Min, top.Y.Max = 0, 1
	}
	for _, r := range runs {
		if err := addBand(top, r, func(p plotPoint) ([2]float64, float64) { return p.levelCI, p.level }, levelBand, levelColour); err != nil {
			return nil, nil, err
		}
		if err := addBand(bottom, r, func(p plotPoint) ([2]float64, float64) { return p.rateCI, p.rate }, rateBand, rateColour); err != nil {
			return nil, nil, err
		}
	}
	zero, err := plotter.NewLine(plotter.XYs{{X: lo, Y: 0}, {X: hi, Y: 0}})
	if err != nil {
		return nil, nil, err
	}
	zero.Color, zero.Width, zero.Dashes = zeroLine, vg.Points(1), []vg.Length{vg.Points(5), vg.Points(3)}
	bottom.Add(zero)
	// Add widened the axes to every point; narrow them to the settled
	// records (see settledCoverage), keeping zero in the rate panel.
	clipped := false
	if y0, y1, ok := settledRange(s.pts, func(p plotPoint) [2]float64 { return p.levelCI }); ok {
		clipped = y0 > top.Y.Min || y1 < top.Y.Max
		top.Y.Min, top.Y.Max = y0, y1
	}
	if y0, y1, ok := settledRange(s.pts, func(p plotPoint) [2]float64 { return p.rateCI }); ok {
		y0, y1 = math.Min(y0, 0), math.Max(y1, 0)
		clipped = clipped || y0 > bottom.Y.Min || y1 < bottom.Y.Max
		bottom.Y.Min, bottom.Y.Max = y0, y1
	}
	if clipped {
		top.Title.Text += "\n(vertical scale set by the records with the window at least half full)"
	}
	return top, bottom, nil
}

// settledRange returns the extent of the 95% intervals of the settled
// points, padded by 5% so the band does not touch the frame; ok is
// false when no point is settled.
func settledRange(pts []plotPoint, ci func(plotPoint) [2]float64) (lo, hi float64, ok bool) {
	lo, hi = math.Inf(1), math.Inf(-1)
	for _, p := range pts {
		if p.ok && p.settled {
			c := ci(p)
			lo, hi = math.Min(lo, c[0]), math.Max(hi, c[1])
		}
	}
	if lo > hi {
		return 0, 0, false
	}
	pad := 0.05 * (hi - lo)
	return lo - pad, hi + pad, true
}

// yearRange names the calendar year, or years, of a span of Unix
// seconds: "2026" or "2026–2027".
func yearRange(lo, hi float64) string {
	a, b := time.Unix(int64(lo), 0).UTC().Year(), time.Unix(int64(hi), 0).UTC().Year()
	if a == b {
		return strconv.Itoa(a)
	}
	return strconv.Itoa(a) + "–" + strconv.Itoa(b)
}

func newPanel() *plot.Plot {
	p := plot.New()
	p.Title.TextStyle.Font.Size = vg.Points(14)
	p.X.Label.TextStyle.Font.Size = vg.Points(12)
	p.Y.Label.TextStyle.Font.Size = vg.Points(12)
	p.X.Tick.Label.Font.Size = vg.Points(10)
	p.Y.Tick.Label.Font.Size = vg.Points(10)
	grid := plotter.NewGrid()
	grid.Vertical.Color = color.Gray{Y: 0xdd}
	grid.Horizontal.Color = color.Gray{Y: 0xdd}
	p.Add(grid)
	return p
}

// okRuns splits points into runs of consecutive usable fits.
func okRuns(pts []plotPoint) [][]plotPoint {
	var runs [][]plotPoint
	start := -1
	for i, p := range pts {
		switch {
		case p.ok && start < 0:
			start = i
		case !p.ok && start >= 0:
			runs = append(runs, pts[start:i])
			start = -1
		}
	}
	if start >= 0 {
		runs = append(runs, pts[start:])
	}
	return runs
}

// addBand adds the 95% band of one run as a filled polygon and the
// estimate as a line on top of it. A run of one point shows as a short
// vertical bar with a dot.
func addBand(p *plot.Plot, run []plotPoint, get func(plotPoint) ([2]float64, float64), fill, line color.Color) error {
	band := make(plotter.XYs, 0, 2*len(run))
	mid := make(plotter.XYs, 0, len(run))
	for _, pt := range run {
		ci, v := get(pt)
		band = append(band, plotter.XY{X: pt.t, Y: ci[1]})
		mid = append(mid, plotter.XY{X: pt.t, Y: v})
	}
	for i := len(run) - 1; i >= 0; i-- {
		ci, _ := get(run[i])
		band = append(band, plotter.XY{X: run[i].t, Y: ci[0]})
	}
	poly, err := plotter.NewPolygon(band)
	if err != nil {
		return err
	}
	poly.Color = fill
	poly.LineStyle.Color = fill
	poly.LineStyle.Width = vg.Points(0.5)
	p.Add(poly)
	l, sc, err := plotter.NewLinePoints(mid)
	if err != nil {
		return err
	}
	l.Color, l.Width = line, vg.Points(1.5)
	p.Add(l)
	if len(run) == 1 {
		sc.Color, sc.Radius, sc.Shape = line, vg.Points(2.5), draw.CircleGlyph{}
		p.Add(sc)
	}
	return nil
}

// WriteFileAtomic writes what write gives to a temporary file beside
// path and renames it into place, so a failed write leaves no
// half-written file. The file is readable by all (0644): it is for
// sharing.
func WriteFileAtomic(path string, write func(io.Writer) error) (err error) {
	f, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*")
	if err != nil {
		return err
	}
	defer func() {
		if err != nil {
			f.Close()
			os.Remove(f.Name())
		}
	}()
	// CreateTemp makes the file private (0600); a picture is for sharing.
	if err = f.Chmod(0o644); err != nil {
		return err
	}
	if err = write(f); err != nil {
		return err
	}
	if err = f.Close(); err != nil {
		return err
	}
	return os.Rename(f.Name(), path)
}

// unlabelled keeps the tick marks of a Ticker and drops its labels.
type unlabelled struct{ plot.Ticker }

// Ticks implements plot.Ticker.
func (u unlabelled) Ticks(lo, hi float64) []plot.Tick {
	ts := u.Ticker.Ticks(lo, hi)
	for i := range ts {
		ts[i].Label = ""
	}
	return ts
}

// dateTicks puts time-axis ticks (values in Unix seconds) on calendar
// boundaries in UTC: minutes, hours, days, Mondays, first days of months
// or of years,
// whichever step gives at most maxDateTicks labels.
type dateTicks struct{}

// The longest label sets how many fit: "2026-03-01 12:00" about six on a
// 7-inch column at 10 pt, "Mar 9" about twelve (common practice: keep
// labels a label's width apart). The year is in the axis label.
const (
	maxShortTicks = 12
	maxLongTicks  = 6
	hourFormat    = "Jan 2 15:04"
	dayFormat     = "Jan 2"
	monthFormat   = "Jan"
	yearFormat    = "2006"
)

// maxDateTicks is the most labels any step gives.
const maxDateTicks = maxShortTicks

type tickStep struct {
	step, minor time.Duration // fixed steps, aligned to Monday 00:00 UTC for weeks
	months      int           // calendar months instead of step (minor: one month)
	format      string
	max         int // most labels
}

var tickSteps = []tickStep{
	{step: 10 * time.Minute, minor: 5 * time.Minute, format: hourFormat, max: maxLongTicks},
	{step: 15 * time.Minute, minor: 5 * time.Minute, format: hourFormat, max: maxLongTicks},
	{step: 30 * time.Minute, minor: 10 * time.Minute, format: hourFormat, max: maxLongTicks},
	{step: time.Hour, minor: 15 * time.Minute, format: hourFormat, max: maxLongTicks},
	{step: 3 * time.Hour, minor: time.Hour, format: hourFormat, max: maxLongTicks},
	{step: 6 * time.Hour, minor: time.Hour, format: hourFormat, max: maxLongTicks},
	{step: 12 * time.Hour, minor: 3 * time.Hour, format: hourFormat, max: maxLongTicks},
	{step: configs.Day, minor: 6 * time.Hour, format: dayFormat, max: maxShortTicks},
	{step: 2 * configs.Day, minor: configs.Day, format: dayFormat, max: maxShortTicks},
	{step: 7 * configs.Day, minor: configs.Day, format: dayFormat, max: maxShortTicks},
	{step: 14 * configs.Day, minor: 7 * configs.Day, format: dayFormat, max: maxShortTicks},
	{months: 1, format: monthFormat, max: maxShortTicks},
	{months: 2, format: monthFormat, max: maxShortTicks},
	{months: 3, format: monthFormat, max: maxShortTicks},
	{months: 6, format: monthFormat, max: maxShortTicks},
	{months: 12, format: yearFormat, max: maxShortTicks},
	{months: 24, format: yearFormat, max: maxShortTicks},
	{months: 60, format: yearFormat, max: maxShortTicks},
	{months: 120, format: yearFormat, max: maxShortTicks},
}

// mondayOffset is where weeks start relative to the Unix epoch, a
// Thursday (1970-01-01): four days later is Monday 1970-01-05.
const mondayOffset = 4 * configs.Day

// Ticks implements plot.Ticker.
func (dateTicks) Ticks(lo, hi float64) []plot.Tick {
	if !(hi > lo) || math.IsInf(lo, 0) || math.IsInf(hi, 0) {
		return []plot.Tick{{Value: lo, Label: time.Unix(int64(lo), 0).UTC().Format("2006-01-02 15:04")}}
	}
	for _, st := range tickSteps {
		var n int
		if st.months > 0 {
			n = int((hi-lo)/(30.4*86400))/st.months + 1
		} else {
			n = int((hi-lo)/st.step.Seconds()) + 1
		}
		if n <= st.max || st.months == tickSteps[len(tickSteps)-1].months {
			return st.ticks(lo, hi)
		}
	}
	return nil
}

func (st tickStep) ticks(lo, hi float64) []plot.Tick {
	var out []plot.Tick
	if st.months > 0 {
		t0 := time.Unix(int64(math.Floor(lo)), 0).UTC()
		m := time.Date(t0.Year(), t0.Month(), 1, 0, 0, 0, 0, time.UTC)
		for k := 0; ; k++ {
			t := m.AddDate(0, k, 0)
			v := float64(t.Unix())
			if v > hi {
				return out
			}
			if v < lo {
				continue
			}
			tk := plot.Tick{Value: v}
			if (t.Year()*12+int(t.Month())-1)%st.months == 0 {
				tk.Label = t.Format(st.format)
				if t.Month() == time.January {
					// The year turns: name it where it does.
					tk.Label = t.Format(yearFormat)
				}
			}
			out = append(out, tk)
		}
	}
	offset := int64(0)
	if st.step%(7*configs.Day) == 0 {
		offset = int64(mondayOffset / time.Second)
	}
	minor := int64(st.minor / time.Second)
	major := int64(st.step / time.Second)
	first := floorDiv(int64(math.Floor(lo))-offset, minor)*minor + offset
	for s := first; float64(s) <= hi; s += minor {
		if float64(s) < lo {
			continue
		}
		tk := plot.Tick{Value: float64(s)}
		if (s-offset)%major == 0 {
			tk.Label = time.Unix(s, 0).UTC().Format(st.format)
		}
		out = append(out, tk)
	}
	return out
}

// floorDiv divides rounding towards minus infinity, so times before the
// epoch land on the same grid.
func floorDiv(a, b int64) int64 {
	q := a / b
	if (a%b != 0) && ((a < 0) != (b < 0)) {
		q--
	}
	return q
}
