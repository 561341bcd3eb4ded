package web

import (
	"bytes"
	"embed"
	"encoding/csv"
	"fmt"
	"html/template"
	"math"
	"net/http"
	"net/url"
	"path"
	"strconv"
	"strings"
	"time"
)

//go:embed assets
var assets embed.FS

var pages = template.Must(template.New("").Funcs(template.FuncMap{
	"num":    fmtNum,
	"pct":    fmtPct,
	"points": shapePoints,
	"deref":  func(p *float64) float64 { return *p },
	"meterw": func(share float64) string { return num(100 * min(max(share, 0), 1)) },
}).ParseFS(assets, "assets/*.html"))

// fmtNum prints a value with five significant digits, without an
// exponent for the magnitudes readings have.
func fmtNum(v float64) string {
	switch {
	case math.IsNaN(v) || math.IsInf(v, 0):
		return "–"
	case v == 0:
		return "0"
	case math.Abs(v) >= 1e-4 && math.Abs(v) < 1e7:
		s := strconv.FormatFloat(v, 'f', max(0, 4-int(math.Floor(math.Log10(math.Abs(v))))), 64)
		if strings.Contains(s, ".") {
			s = strings.TrimRight(strings.TrimRight(s, "0"), ".")
		}
		return s
	}
	return strconv.FormatFloat(v, 'g', 5, 64)
}

func fmtPct(v float64) string { return strconv.FormatFloat(100*v, 'f', 0, 64) + "%" }

// fmtTime prints a time for people: "3 Dec 2026 08:15 UTC".
func (h *handler) fmtTime(t time.Time) string {
	if t.IsZero() {
		return "–"
	}
	return t.In(h.o.Location).Format("2 Jan 2006 15:04 MST")
}

func (h *handler) tickLabel(t time.Time, step time.Duration) string {
	t = t.In(h.o.Location)
	if step >= day {
		return t.Format("2 Jan")
	}
	if t.Hour() == 0 && t.Minute() == 0 {
		return t.Format("2 Jan")
	}
	return t.Format("15:04")
}

// fmtIn says how far t is from now: "in 12.3 days", "2.0 days ago".
func fmtIn(t, now time.Time) string {
	d := days(t.Sub(now))
	switch {
	case math.Abs(d) < 1.0/24:
		return "now"
	case d > 0:
		return "in " + strconv.FormatFloat(d, 'f', 1, 64) + " days"
	}
	return strconv.FormatFloat(-d, 'f', 1, 64) + " days ago"
}

func (h *handler) asset(w http.ResponseWriter, r *http.Request) {
	name := r.PathValue("name")
	b, err := assets.ReadFile("assets/" + path.Base(name))
	if err != nil || strings.HasSuffix(name, ".html") {
		http.NotFound(w, r)
		return
	}
	switch path.Ext(name) {
	case ".css":
		w.Header().Set("Content-Type", "text/css; charset=utf-8")
	case ".js":
		w.Header().Set("Content-Type", "text/javascript; charset=utf-8")
	case ".svg":
		w.Header().Set("Content-Type", "image/svg+xml")
	}
	w.Header().Set("Cache-Control", "max-age=300")
	_, _ = w.Write(b)
}

type pageBase struct {
	Title       string
	Stamp       string
	Refresh     int // milliseconds, fleet page; 0: no refresh
	RefreshText string
}

func (h *handler) render(w http.ResponseWriter, status int, name string, data any) {
	var buf bytes.Buffer
	if err := pages.ExecuteTemplate(&buf, name, data); err != nil {
		h.o.Logger.Warn().Err(err).Str("template", name).Msg("page not rendered")
		http.Error(w, "page not rendered: "+err.Error(), http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(status)
	_, _ = w.Write(buf.Bytes())
}

func (h *handler) renderError(w http.ResponseWriter, status int, msg string) {
	h.render(w, status, "error.html", struct {
		pageBase
		Status int
		Text   string
		Msg    string
	}{pageBase{Title: http.StatusText(status)}, status, http.StatusText(status), msg})
}

func (h *handler) renderLogin(w http.ResponseWriter, r *http.Request, status int, msg string) {
	next := r.URL.RequestURI()
	if r.Method == http.MethodPost {
		next = r.PostFormValue("next")
	}
	h.render(w, status, "login.html", struct {
		pageBase
		Next, Msg string
	}{pageBase{Title: "Token required"}, next, msg})
}

// fleetRowView adds the texts of a row for the template.
type fleetRowView struct {
	FleetRow
	TicketDue, TicketWhen, ExitText, ExitWhen, LastText, StateText string
}

func (h *handler) fleetRowViews(f *Fleet) []fleetRowView {
	out := make([]fleetRowView, len(f.Sensors))
	for i, r := range f.Sensors {
		v := fleetRowView{FleetRow: r, LastText: h.fmtTime(r.Last)}
		if r.Ticket != nil {
			v.TicketDue, v.TicketWhen = h.fmtTime(r.Ticket.Due), fmtIn(r.Ticket.Due, f.AsOf)
			if r.Ticket.Due.Before(f.AsOf) {
				v.TicketWhen = "overdue " + strings.TrimSuffix(v.TicketWhen, " ago")
			}
		}
		if r.Exit != nil {
			v.ExitText, v.ExitWhen = h.fmtTime(r.Exit.At), fmtIn(r.Exit.At, f.AsOf)
			if r.Exit.Kind == "already past" {
				v.ExitWhen = "already out (" + r.Exit.Edge + ")"
			}
		}
		switch r.State {
		case StateJudged:
			v.StateText = "judged"
		case StateNotJudged:
			v.StateText = "not judged because: " + r.Reason
		default:
			v.StateText = "not judged because: no rule"
		}
		out[i] = v
	}
	return out
}

func (h *handler) fleetPage(w http.ResponseWriter, r *http.Request) {
	q, ok := h.fleetOf(w, r)
	if !ok {
		return
	}
	asof, live, flt, f := q.asof, q.live, q.flt, q.f
	refresh := 0
	if live {
		refresh = int(h.o.Refresh / time.Millisecond)
	}
	h.render(w, http.StatusOK, "fleet.html", struct {
		pageBase
		Fleet  *Fleet
		Rows   []fleetRowView
		Filter fleetFilter
		States []string
		AsOf   string
		Live   bool
	}{pageBase{Title: "Fleet", Stamp: h.fmtTime(asof), Refresh: refresh, RefreshText: h.o.Refresh.String()}, f, h.fleetRowViews(f), flt,
		[]string{StateJudged, StateNotJudged, StateNoRule}, r.URL.Query().Get("asof"), live})
}

// windowText holds a window's summary texts for the template.
type windowText struct {
	WindowView
	Colour, RecordText, ExitText, Level, Drift, Curv, Growth, Resid, JudgedByText string
}

type eventText struct {
	At, Type, Kind, Severity, Window, Value, Limit, Unit, Class string
}

type ticketText struct {
	TicketView
	OpenedText, DueText, ClosedText, AsFound string
}

type historyText struct {
	HistoryRow
	TimeText, Level, Drift, Resid, R2 string
}

// maxHistoryRows bounds the page's fit-history table; the CSV and JSON
// exports hold every record.
const maxHistoryRows = 400

func pm(v, ci float64) string { return fmtNum(v) + " ± " + fmtNum(ci) }

func (h *handler) renderSensor(w http.ResponseWriter, r *http.Request, v *SensorView) {
	chart := h.buildChart(v)
	var wins []windowText
	for i, wv := range v.Windows {
		t := windowText{WindowView: wv, Colour: windowColours[i%len(windowColours)], RecordText: h.fmtTime(wv.Record)}
		switch wv.JudgedBy {
		case JudgedByService:
			t.JudgedByText = "the running service, at its latest pane close"
		case JudgedByStoredFit:
			t.JudgedByText = "this fit record, with the alert rules' gates"
		}
		f := wv.Fit
		half := func(k int) float64 { return (f.CI[k][1] - f.CI[k][0]) / 2 }
		if f.Status == "ok" || f.Status == "constant" {
			switch f.Model {
			case "exp":
				t.Level = pm(math.Exp(f.Coef[0]), 0) + " " + v.Unit
				t.Level = fmtNum(math.Exp(f.Coef[0])) + " " + v.Unit
				t.Growth = pm(f.Coef[1], half(1)) + " /day"
				if f.Coef[1] != 0 {
					t.Growth += fmt.Sprintf(" (doubling %s days)", fmtNum(math.Ln2/f.Coef[1]))
				}
				t.Resid = fmtNum(f.ResidSD) + " in ln " + v.Unit
			default:
				t.Level = pm(f.Coef[0], half(0)) + " " + v.Unit
				t.Drift = pm(f.Coef[1], half(1)) + " " + v.Unit + "/day"
				if f.Model == "parabola" {
					t.Curv = pm(f.Coef[2], half(2)) + " " + v.Unit + "/day²"
				}
				t.Resid = fmtNum(f.ResidSD) + " " + v.Unit
			}
		}
		if e := wv.Exit; e != nil {
			t.ExitText = e.Edge + " edge " + h.fmtTime(e.At) + " (" + fmtIn(e.At, v.AsOf) + ")"
			if e.Kind == "already past" {
				t.ExitText = "already beyond the " + e.Edge + " edge"
			}
		}
		wins = append(wins, t)
	}
	var evs []eventText
	for i := len(v.Events) - 1; i >= 0; i-- {
		ev := v.Events[i]
		evs = append(evs, eventText{At: h.fmtTime(ev.At), Type: ev.Type.String(), Kind: ev.Kind.String(), Severity: ev.Severity.String(),
			Window: ev.Window, Value: fmtNum(ev.Value), Limit: fmtNum(ev.Limit), Unit: ev.Unit, Class: ev.Class})
	}
	var tks []ticketText
	for _, tk := range v.Tickets {
		t := ticketText{TicketView: tk, OpenedText: h.fmtTime(tk.Opened), DueText: h.fmtTime(tk.Due)}
		t.AsFound = fmt.Sprintf("%s (%s to %s) %s", fmtNum(tk.AsFound.Deviation), fmtNum(tk.AsFound.Low), fmtNum(tk.AsFound.High), tk.Unit)
		if tk.Calibration != nil {
			t.ClosedText = fmt.Sprintf("%s: as-found %s, as-left %s", h.fmtTime(tk.Calibration.Time), fmtNum(tk.Calibration.AsFound), fmtNum(tk.Calibration.AsLeft))
		}
		tks = append(tks, t)
	}
	var hist []historyText
	for i := len(v.History) - 1; i >= 0 && len(hist) < maxHistoryRows; i-- {
		row := v.History[i]
		hist = append(hist, historyText{HistoryRow: row, TimeText: h.fmtTime(row.Time),
			Level: pm(row.Level, row.LevelSE), Drift: pm(row.Drift, (row.DriftCI[1]-row.DriftCI[0])/2),
			Resid: fmtNum(row.ResidSD), R2: fmtNum(row.R2)})
	}
	q := url.Values{}
	if !v.Live {
		q.Set("asof", v.AsOf.UTC().Format(time.RFC3339))
	}
	base := sensorHref(v.ID)
	exportQ := ""
	if len(q) > 0 {
		exportQ = "?" + q.Encode()
	}
	shift := func(d time.Duration) string {
		return base + "?" + url.Values{"asof": {v.AsOf.Add(d).UTC().Format(time.RFC3339)}}.Encode()
	}
	var asLeftText string
	if v.AsLeft != nil {
		asLeftText = fmtNum(v.AsLeft.Value) + " " + v.Unit + " (" + v.AsLeft.Source
		if !v.AsLeft.Since.IsZero() {
			asLeftText += ", " + h.fmtTime(v.AsLeft.Since)
		}
		asLeftText += ")"
	}
	h.render(w, http.StatusOK, "sensor.html", struct {
		pageBase
		V                   *SensorView
		PaneCharts          []*svgPaneChart
		Chart               *svgChart
		Windows             []windowText
		Events              []eventText
		Tickets             []ticketText
		History             []historyText
		HistoryMore         int
		AsOfValue           string
		AsOfText            string
		CSV, JSON, API      string
		Back1d, Back7d, Fwd string
		Now                 string
		AsLeftText          string
		LimitsText          []string
	}{
		pageBase: pageBase{Title: v.ID, Stamp: h.fmtTime(h.o.Now())},
		V:        v, PaneCharts: h.paneCharts(v), Chart: chart, Windows: wins, Events: evs, Tickets: tks, History: hist,
		HistoryMore: len(v.History) - len(hist),
		AsOfValue:   v.AsOf.In(h.o.Location).Format("2006-01-02T15:04"),
		AsOfText:    h.fmtTime(v.AsOf),
		CSV:         base + ".csv" + exportQ, JSON: base + ".json" + exportQ, API: "/api" + base + exportQ,
		Back1d: shift(-day), Back7d: shift(-7 * day), Fwd: shift(day), Now: base,
		AsLeftText: asLeftText, LimitsText: limitsText(v),
	})
}

func limitsText(v *SensorView) []string {
	var out []string
	l := v.Limits
	pair := func(name string, w, c float64, unit string) {
		switch {
		case w > 0 && c > 0:
			out = append(out, fmt.Sprintf("%s: warning %s, critical %s %s", name, fmtNum(w), fmtNum(c), unit))
		case c > 0:
			out = append(out, fmt.Sprintf("%s: critical %s %s", name, fmtNum(c), unit))
		case w > 0:
			out = append(out, fmt.Sprintf("%s: warning %s %s", name, fmtNum(w), unit))
		}
	}
	pair("slope", l.SlopeWarning, l.SlopeCritical, v.Unit+"/day")
	pair("curvature", l.CurvatureWarning, l.CurvatureCritical, v.Unit+"/day²")
	pair("doubling time", l.DoublingWarning, l.DoublingCritical, "days")
	pair("lead time", l.LeadTimeWarning, l.LeadTimeCritical, "days")
	return out
}

// writeCSV writes what the sensor page shows as one RFC 4180 table: the
// newest fit of each window ("fit"), its pane means ("pane": time is the
// readings' mean time, status in_fit or not_in_fit, n the readings, and
// the six pane columns), every fit record of the chart's range
// ("history"), the alert events ("event"), tickets ("ticket") and
// calibrations ("calibration": status in_force, voided or corrected as
// it stood then, the last two columns, and the record's number and
// changes in detail).
func (h *handler) writeCSV(w http.ResponseWriter, v *SensorView) {
	var buf bytes.Buffer
	cw := csv.NewWriter(&buf)
	f := func(x float64) string { return strconv.FormatFloat(x, 'g', -1, 64) }
	ts := func(t time.Time) string {
		if t.IsZero() {
			return ""
		}
		return t.UTC().Format(time.RFC3339Nano)
	}
	coef := func(c []float64, i int) string {
		if i < len(c) {
			return f(c[i])
		}
		return ""
	}
	opt := func(p *float64) string {
		if p == nil {
			return ""
		}
		return f(*p)
	}
	none := make([]string, 8) // the pane and calibration columns of the other rows
	_ = cw.Write([]string{"record", "sensor", "time", "window", "model", "status", "n", "coverage", "level", "level_se",
		"drift_per_day", "drift_se", "c0", "c1", "c2", "resid_sd", "r2", "judged", "detail",
		"pane_start", "pane_end", "mean", "geo_mean", "fitted", "residual", "as_found", "as_left"})
	for _, wv := range v.Windows {
		_ = cw.Write(append([]string{"fit", v.ID, ts(wv.Record), wv.Window, wv.Fit.Model, wv.Fit.Status, strconv.Itoa(wv.N), f(wv.Coverage),
			coef(wv.Line.Coef, 0), coef(wv.Line.SE, 0), coef(wv.Line.Coef, 1), coef(wv.Line.SE, 1),
			coef(wv.Fit.Coef, 0), coef(wv.Fit.Coef, 1), coef(wv.Fit.Coef, 2), f(wv.Fit.ResidSD), f(wv.Fit.R2),
			strconv.FormatBool(wv.Judged), wv.Reason}, none...))
		for _, p := range wv.PaneMeans {
			st := "in_fit"
			if !p.InFit {
				st = "not_in_fit"
			}
			_ = cw.Write([]string{"pane", v.ID, ts(p.T), wv.Window, wv.Fit.Model, st, strconv.Itoa(p.N), "", "", "", "", "",
				"", "", "", "", "", "", "", ts(p.Start), ts(p.End), f(p.Mean), opt(p.GeoMean), opt(p.Fit), opt(p.Resid), "", ""})
		}
		if wv.PaneMeansNote != "" {
			_ = cw.Write(append([]string{"pane_note", v.ID, ts(wv.Record), wv.Window, wv.Fit.Model, "", "", "", "", "", "", "",
				"", "", "", "", "", "", wv.PaneMeansNote}, none...))
		}
	}
	for _, r := range v.History {
		_ = cw.Write(append([]string{"history", v.ID, ts(r.Time), r.Window, r.Model, r.Status, strconv.Itoa(r.N), f(r.Coverage),
			f(r.Level), f(r.LevelSE), f(r.Drift), f(r.DriftSE), coef(r.Coef, 0), coef(r.Coef, 1), coef(r.Coef, 2),
			f(r.ResidSD), f(r.R2), "", ""}, none...))
	}
	for _, ev := range v.Events {
		_ = cw.Write(append([]string{"event", v.ID, ts(ev.At), ev.Window, ev.Model, ev.Type.String(), strconv.Itoa(ev.N), "", "", "", "", "",
			"", "", "", "", "", "", fmt.Sprintf("%s %s value %s limit %s %s", ev.Severity, ev.Kind, f(ev.Value), f(ev.Limit), ev.Unit)}, none...))
	}
	for _, tk := range v.Tickets {
		st := "closed"
		if tk.Open {
			st = "open"
		}
		_ = cw.Write(append([]string{"ticket", v.ID, ts(tk.Opened), tk.Window, tk.Evidence.Model, st, "", "", "", "", "", "",
			"", "", "", "", "", "", fmt.Sprintf("%s %s due %s", tk.Severity, tk.Reason, ts(tk.Due))}, none...))
	}
	for _, c := range v.Calibrations {
		_ = cw.Write(append(append([]string{"calibration", v.ID, ts(c.Time), "", "", calibrationStatus(&c), "", "", "", "", "", "",
			"", "", "", "", "", "", calibrationDetail(&c, ts)}, none[:6]...), opt(c.AsFound), opt(c.AsLeft)))
	}
	cw.Flush()
	w.Header().Set("Content-Type", "text/csv; charset=utf-8")
	w.Header().Set("Content-Disposition", `attachment; filename="`+csvName(v)+`"`)
	_, _ = w.Write(buf.Bytes())
}

// calibrationStatus is a calibration's state as the page shows it:
// in_force, voided or corrected.
func calibrationStatus(c *CalibrationView) string {
	switch {
	case !c.Voided.IsZero():
		return "voided"
	case !c.Corrected.IsZero():
		return "corrected"
	}
	return "in_force"
}

// calibrationDetail says what the record tells of a calibration besides
// its values: number, when recorded, what it corrects, the ticket it
// closed, and when and why it was voided or corrected; for one read
// back from tickets and events, that it has no record.
func calibrationDetail(c *CalibrationView, ts func(time.Time) string) string {
	if c.Seq == 0 {
		d := "no record (from tickets and events)"
		if c.Ticket != "" {
			d += "; closed ticket " + c.Ticket
		}
		return d
	}
	d := fmt.Sprintf("no. %d recorded %s", c.Seq, ts(c.Recorded))
	if c.Corrects > 0 {
		d += fmt.Sprintf("; corrects no. %d", c.Corrects)
	}
	if c.Ticket != "" {
		d += "; closed ticket " + c.Ticket
	}
	switch {
	case !c.Voided.IsZero():
		d += "; voided " + ts(c.Voided)
	case !c.Corrected.IsZero():
		d += fmt.Sprintf("; corrected %s by no. %d", ts(c.Corrected), c.CorrectedBy)
	}
	if c.Reason != "" {
		d += ": " + c.Reason
	}
	return d
}

// csvName is a file name safe in a header: the id's letters, digits,
// dots and dashes, others replaced by "_".
func csvName(v *SensorView) string {
	b := []byte(v.ID)
	for i, c := range b {
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '.' || c == '-') {
			b[i] = '_'
		}
	}
	return string(b) + "-" + v.AsOf.UTC().Format("20060102T150405Z") + ".csv"
}
