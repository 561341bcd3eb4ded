package report

import (
	"fmt"
	"math"
	"slices"
	"strconv"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/chart"
	"driftfit/rolling"
)

// figure is a picture of fit history before drawing: every element in
// data coordinates (Unix seconds across, the panel's quantity up), so
// that what is drawn can be checked without reading pixels.
type figure struct {
	sensor, unit string
	subtitle     string
	from, to     float64 // the shared time axis
	cols         []column
	legend       legendSet
}

type column struct {
	label  string
	panels []panel
	strip  []mark // the marker strip below the panels
}

type panelKind uint8

const (
	levelPanel panelKind = iota
	slopePanel
	curvaturePanel
	growthPanel
)

type panel struct {
	kind          panelKind
	title, ylabel string
	lo, hi        float64 // the value axis
	runs          [][]curvePt
	bands         []box   // tolerance band, one box per as-left
	hlines        []hline // as-left, tolerance edges, limits, zero
	vlines        []float64
	marks         []mark // alerts at their fitted value
	offScale      int    // records whose estimate lies off the value axis
}

// curvePt is one record's estimate and 95% interval.
type curvePt struct{ t, v, lo, hi float64 }

type box struct{ t0, t1, y0, y1 float64 }

type lineKind uint8

const (
	zeroLine lineKind = iota
	asLeftLine
	toleranceEdge
	warningLine
	criticalLine
)

type hline struct {
	kind   lineKind
	t0, t1 float64
	y      float64
}

type markKind uint8

const (
	markRaised markKind = iota // raised or escalated
	markEnded                  // cleared or reset
	markTicketOpened
	markTicketDue
	markTicketClosed
	markCalibration
	markVoided // a voided calibration
)

// Rows of the marker strip, bottom up.
const (
	calibrationRow = 0.5
	ticketRow      = 1.5
	alertRow       = 2.5
	stripRows      = 3
)

type mark struct {
	kind     markKind
	critical bool
	t, y     float64
}

// legendSet records what the legend must explain, with the values that
// go in its labels.
type legendSet struct {
	band, asLeft, edges   bool
	asLeftText, bandText  string
	warning, critical     bool
	limitText             string
	raised, ended         bool
	opened, due, closed   bool
	calibration, offScale bool
	voided                bool
	notes                 []string
}

// buildFigure lays out the series and annotations (an may be nil).
func buildFigure(sensor, unit string, series []plotSeries, an *Annotations) *figure {
	if an == nil {
		an = &Annotations{}
	}
	fig := &figure{sensor: sensor, unit: unit}
	fig.from, fig.to = series[0].pts[0].t, series[0].pts[0].t
	for _, s := range series {
		fig.from, fig.to = min(fig.from, s.pts[0].t), max(fig.to, s.pts[len(s.pts)-1].t)
	}
	last := fig.to
	// A ticket due after the last record extends the axis to its due
	// date, up to three quarters of the records' span further (beyond,
	// the history would shrink to a corner; the legend names it).
	reach := last + dueReach*max(last-fig.from, 86400)
	for _, tk := range an.Tickets {
		if d := unixSeconds(tk.Due); d > fig.to && d <= reach && !tk.Opened.After(unixTime(last)) {
			fig.to = d
		}
	}
	if fig.to > last {
		fig.to += 0.02 * (fig.to - fig.from)
	}
	if fig.to <= fig.from {
		// One record: an hour either side, so it has a place on the axis.
		fig.from, fig.to = fig.from-3600, fig.to+3600
	}
	in := func(t float64) bool { return t >= fig.from && t <= fig.to }

	trend := an.Trend
	if trend != rolling.Parabola {
		trend = rolling.Line
	}
	kinds := []panelKind{levelPanel, slopePanel}
	if slices.Contains(an.Models, rolling.Parabola) {
		kinds = append(kinds, curvaturePanel)
	}
	if slices.Contains(an.Models, rolling.Exp) {
		kinds = append(kinds, growthPanel)
	}
	u := unit
	perDay, perDay2 := u+"/day", u+"/day²"
	if u == "" {
		perDay, perDay2 = "per day", "per day²"
	}

	// The band: one box per as-left value, from its Since (or the axis
	// start) to the next one's.
	var bands []box
	var asLefts []hline
	for i, a := range an.AsLeft {
		t0, t1 := fig.from, fig.to
		if !a.Since.IsZero() {
			t0 = max(t0, unixSeconds(a.Since))
		}
		if i+1 < len(an.AsLeft) {
			t1 = min(t1, unixSeconds(an.AsLeft[i+1].Since))
		}
		if t1 <= t0 {
			continue
		}
		asLefts = append(asLefts, hline{kind: asLeftLine, t0: t0, t1: t1, y: a.Value})
		if an.Tolerance > 0 {
			bands = append(bands, box{t0, t1, a.Value - an.Tolerance, a.Value + an.Tolerance})
		}
		fig.legend.asLeft = true
		src := fmt.Sprintf("%s %s (%s)", plotNum(a.Value), u, a.Source)
		if fig.legend.asLeftText == "" {
			fig.legend.asLeftText = "as-left " + src
		} else {
			fig.legend.asLeftText += ", then " + src
		}
	}
	if an.Tolerance > 0 && len(asLefts) == 0 {
		fig.legend.notes = append(fig.legend.notes, fmt.Sprintf("no tolerance band (± %s %s): no as-left known yet (no calibration, configured as_left, ticket or fit that passed the evidence gates)", plotNum(an.Tolerance), u))
	}
	if len(bands) > 0 {
		fig.legend.band, fig.legend.edges = true, true
		fig.legend.bandText = fmt.Sprintf("tolerance band: as-left ± %s %s", plotNum(an.Tolerance), u)
	}

	var cals, voided []float64
	for _, c := range an.Calibrations {
		t := unixSeconds(c.Time)
		if !in(t) {
			continue
		}
		switch {
		case c.Stands():
			cals = append(cals, t)
		case !c.Voided.IsZero():
			voided = append(voided, t)
			fig.legend.notes = append(fig.legend.notes, voidedNote(&c, u))
		}
	}
	fig.legend.notes = append(fig.legend.notes, an.Notes...)

	lim := an.Limits
	var limitTexts []string
	for _, s := range series {
		col := column{label: s.label}
		wname := alert.WindowName(s.spec)
		evs := eventsOf(an.Events, wname, fig.from, last)
		for _, k := range kinds {
			p := panel{kind: k, vlines: cals}
			var get func(pt *plotPoint) (v float64, ci [2]float64, ok bool)
			var anchors []float64
			var warn, crit float64
			switch k {
			case levelPanel:
				p.title = fmt.Sprintf("window %s  ·  level of the %s fit", s.label, trend)
				p.ylabel = labelWithUnit("level", u)
				i := fitIndex(trend)
				get = func(pt *plotPoint) (float64, [2]float64, bool) {
					f := &pt.fits[i]
					return f.coef[0], f.ci[0], f.ok
				}
				p.bands = bands
				for _, b := range bands {
					anchors = append(anchors, b.y0, b.y1)
					p.hlines = append(p.hlines, hline{toleranceEdge, b.t0, b.t1, b.y0}, hline{toleranceEdge, b.t0, b.t1, b.y1})
				}
				for _, a := range asLefts {
					anchors = append(anchors, a.y)
					p.hlines = append(p.hlines, a)
				}
			case slopePanel:
				p.title = "drift rate: slope of the line fit"
				p.ylabel = labelWithUnit("drift rate", perDay)
				get = coefGetter(rolling.Line, 1)
				warn, crit = lim.SlopeWarning, lim.SlopeCritical
			case curvaturePanel:
				p.title = "curvature: c2 of the parabola fit"
				p.ylabel = labelWithUnit("curvature", perDay2)
				get = coefGetter(rolling.Parabola, 2)
				warn, crit = lim.CurvatureWarning, lim.CurvatureCritical
			case growthPanel:
				p.title = "growth rate of the exponential fit (doubling time = ln 2 / rate)"
				p.ylabel = "growth rate (1/day)"
				get = coefGetter(rolling.Exp, 1)
				warn, crit = growthOf(lim.DoublingWarning), growthOf(lim.DoublingCritical)
			}
			if k != levelPanel {
				anchors = append(anchors, 0)
				p.hlines = append(p.hlines, hline{zeroLine, fig.from, fig.to, 0})
				for _, l := range []struct {
					v    float64
					kind lineKind
				}{{warn, warningLine}, {crit, criticalLine}} {
					if l.v <= 0 {
						continue
					}
					ys := []float64{l.v, -l.v}
					if k == growthPanel {
						ys = ys[:1] // doubling limits judge growth only
					}
					for _, y := range ys {
						p.hlines = append(p.hlines, hline{l.kind, fig.from, fig.to, y})
						anchors = append(anchors, y)
					}
					fig.legend.warning = fig.legend.warning || l.kind == warningLine
					fig.legend.critical = fig.legend.critical || l.kind == criticalLine
				}
				if txt := limitText(k, warn, crit, lim, perDay, perDay2); txt != "" && !slices.Contains(limitTexts, txt) {
					limitTexts = append(limitTexts, txt)
				}
			}
			var run []curvePt
			for j := range s.pts {
				v, ci, ok := get(&s.pts[j])
				if !ok || !finite(v) || !finite(ci[0]) || !finite(ci[1]) {
					if len(run) > 0 {
						p.runs = append(p.runs, run)
						run = nil
					}
					continue
				}
				run = append(run, curvePt{s.pts[j].t, v, ci[0], ci[1]})
			}
			if len(run) > 0 {
				p.runs = append(p.runs, run)
			}
			p.lo, p.hi = chart.RobustRange(scalePool(p.runs), anchors)
			for _, r := range p.runs {
				for _, c := range r {
					if c.v < p.lo || c.v > p.hi {
						p.offScale++
					}
				}
			}
			if p.offScale > 0 {
				fig.legend.offScale = true
				p.title += fmt.Sprintf("  ·  %d off the scale", p.offScale)
			}
			p.marks = alertMarks(evs, k)
			col.panels = append(col.panels, p)
		}
		col.strip = stripMarks(evs, an.Tickets, cals, voided, fig.from, fig.to, last)
		for _, m := range col.strip {
			switch m.kind {
			case markRaised:
				fig.legend.raised = true
			case markEnded:
				fig.legend.ended = true
			case markTicketOpened:
				fig.legend.opened = true
			case markTicketDue:
				fig.legend.due = true
			case markTicketClosed:
				fig.legend.closed = true
			case markCalibration:
				fig.legend.calibration = true
			case markVoided:
				fig.legend.voided = true
			}
		}
		fig.cols = append(fig.cols, col)
	}
	if len(limitTexts) > 0 {
		fig.legend.limitText = joinList(limitTexts)
	}
	for _, tk := range an.Tickets {
		if d := unixSeconds(tk.Due); d > fig.to && tk.Calibration == nil && !tk.Opened.After(unixTime(last)) {
			fig.legend.notes = append(fig.legend.notes, fmt.Sprintf("ticket %s due %s, beyond the time axis", EscapeID(tk.ID), tk.Due.UTC().Format(time.DateOnly)))
		}
	}
	fig.subtitle = subtitle(an, unit, fig.from, last)
	return fig
}

// precise is how many times the median width of the 95% intervals a
// record's interval may be for the record to set the value axis. A
// window that is filling, or that holds one wild reading, gives records
// whose intervals are tens of times the usual width (a week of them for
// a 7-day window); more than the 2% the percentiles trim, they would
// still flatten the weeks that matter. They run off the scale instead.
const precise = 4

// scalePool returns the values that set a panel's axis: estimate and
// interval ends of every record whose interval is at most precise times
// the median width. chart.RobustRange then trims the 2% at either end.
func scalePool(runs [][]curvePt) []float64 {
	var widths []float64
	for _, r := range runs {
		for _, c := range r {
			widths = append(widths, c.hi-c.lo)
		}
	}
	limit := precise * chart.Percentile(widths, 0.5)
	var pool []float64
	for _, r := range runs {
		for _, c := range r {
			if c.hi-c.lo <= limit {
				pool = append(pool, c.v, c.lo, c.hi)
			}
		}
	}
	return pool
}

// dueReach is how far past the last record, as a fraction of the
// records' span, the time axis stretches to show a ticket's due date.
const dueReach = 0.75

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

func labelWithUnit(name, unit string) string {
	if unit == "" {
		return name
	}
	return name + " (" + unit + ")"
}

// coefGetter returns coefficient i of model m and its interval.
func coefGetter(m rolling.Model, i int) func(pt *plotPoint) (float64, [2]float64, bool) {
	k := fitIndex(m)
	return func(pt *plotPoint) (float64, [2]float64, bool) {
		f := &pt.fits[k]
		return f.coef[i], f.ci[i], f.ok
	}
}

// growthOf is the growth rate per day of a doubling time d: ln 2 / d
// (d in days); 0 for none.
func growthOf(d time.Duration) float64 {
	if d <= 0 {
		return 0
	}
	return math.Ln2 / (d.Hours() / 24)
}

func limitText(k panelKind, warn, crit float64, lim Limits, perDay, perDay2 string) string {
	levels := func(w, c string) string {
		switch {
		case w != "" && c != "":
			return "warning " + w + ", critical " + c
		case w != "":
			return "warning " + w
		case c != "":
			return "critical " + c
		}
		return ""
	}
	fmtRate := func(v float64, unit string) string {
		if v <= 0 {
			return ""
		}
		return "±" + plotNum(v) + " " + unit
	}
	switch k {
	case slopePanel:
		if l := levels(fmtRate(warn, perDay), fmtRate(crit, perDay)); l != "" {
			return "slope " + l
		}
	case curvaturePanel:
		if l := levels(fmtRate(warn, perDay2), fmtRate(crit, perDay2)); l != "" {
			return "curvature " + l
		}
	case growthPanel:
		fmtDays := func(d time.Duration) string {
			if d <= 0 {
				return ""
			}
			return plotNum(d.Hours()/24) + " d"
		}
		if l := levels(fmtDays(lim.DoublingWarning), fmtDays(lim.DoublingCritical)); l != "" {
			return "doubling time " + l
		}
	}
	return ""
}

// eventsOf returns the events of window (or of no window) from from to
// last.
func eventsOf(evs []alert.Event, window string, from, last float64) []alert.Event {
	var out []alert.Event
	for _, ev := range evs {
		t := unixSeconds(ev.At)
		if (ev.Window == window || ev.Window == "") && t >= from && t <= last {
			out = append(out, ev)
		}
	}
	return out
}

// alertMarks places the raises of the panel's kind at their time and
// fitted value: a slope alert on the slope curve, and so on.
func alertMarks(evs []alert.Event, k panelKind) []mark {
	want := map[panelKind]alert.Kind{slopePanel: alert.Slope, curvaturePanel: alert.Curvature, growthPanel: alert.Doubling}[k]
	if k == levelPanel {
		return nil
	}
	var out []mark
	for _, ev := range evs {
		if ev.Kind != want || (ev.Type != alert.Raised && ev.Type != alert.Escalated) {
			continue
		}
		out = append(out, mark{kind: markRaised, critical: ev.Severity == alert.Critical, t: unixSeconds(ev.At), y: ev.Value})
	}
	return out
}

// maxReasonRunes is the most of a void's reason the legend shows.
const maxReasonRunes = 60

// voidedNote names a voided calibration in the legend: its number,
// date and as-left, when it was voided and why.
func voidedNote(c *chart.Calibration, unit string) string {
	note := "calibration"
	if c.Seq > 0 {
		note += fmt.Sprintf(" no. %d", c.Seq)
	}
	note += " of " + c.Time.UTC().Format(time.DateOnly)
	if c.AsLeft != nil {
		note += fmt.Sprintf(" (as-left %s %s)", plotNum(*c.AsLeft), unit)
	}
	note += " voided " + c.Voided.UTC().Format(time.DateOnly)
	if c.Reason != "" {
		r := []rune(c.Reason)
		if len(r) > maxReasonRunes {
			r = append(r[:maxReasonRunes-1], '…')
		}
		note += ": " + strconv.Quote(string(r))
	}
	return note
}

// stripMarks places every event, ticket and calibration (cals those
// that stand, voided the voided ones) on the strip.
func stripMarks(evs []alert.Event, tks []alert.Ticket, cals, voided []float64, from, to, last float64) []mark {
	var out []mark
	for _, ev := range evs {
		m := mark{kind: markRaised, critical: ev.Severity == alert.Critical, t: unixSeconds(ev.At), y: alertRow}
		if ev.Type == alert.Cleared || ev.Type == alert.Reset {
			m.kind = markEnded
		}
		out = append(out, m)
	}
	in := func(t float64) bool { return t >= from && t <= to }
	for _, tk := range tks {
		if t := unixSeconds(tk.Opened); t >= from && t <= last {
			out = append(out, mark{kind: markTicketOpened, critical: tk.Severity == alert.Critical, t: t, y: ticketRow})
		}
		if t := unixSeconds(tk.Due); in(t) && !tk.Opened.After(unixTime(last)) {
			out = append(out, mark{kind: markTicketDue, critical: tk.Severity == alert.Critical, t: t, y: ticketRow})
		}
		if c := tk.Calibration; c != nil {
			if t := unixSeconds(c.Time); in(t) {
				out = append(out, mark{kind: markTicketClosed, t: t, y: ticketRow})
			}
		}
	}
	for _, t := range cals {
		out = append(out, mark{kind: markCalibration, t: t, y: calibrationRow})
	}
	for _, t := range voided {
		out = append(out, mark{kind: markVoided, t: t, y: calibrationRow})
	}
	return out
}

func joinList(xs []string) string {
	out := ""
	for i, x := range xs {
		if i > 0 {
			out += "; "
		}
		out += x
	}
	return out
}

// subtitle says what the page shows and where its reference values
// come from.
func subtitle(an *Annotations, unit string, from, last float64) string {
	s := unixTime(from).Format("2006-01-02 15:04") + " to " + unixTime(last).Format("2006-01-02 15:04") + " UTC"
	if an.Class != "" {
		s += "  ·  class " + an.Class
	}
	if unit == "" {
		s += "  ·  unit not known (give --unit or --config)"
	}
	return s
}

// plotNum writes a value of the legend with four significant digits.
func plotNum(v float64) string { return Sig(v, 4) }
