package web

import (
	"errors"
	"slices"
	"strings"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/chart"
	"driftfit/rolling"
	"driftfit/store"
)

// FitView is one fit of one window as stored, on τ in days from Last.
type FitView struct {
	Model   string       `json:"model"`
	Status  string       `json:"status"`
	N       int          `json:"n"`
	First   time.Time    `json:"first"`
	Last    time.Time    `json:"last"`
	Coef    []float64    `json:"coef"`
	SE      []float64    `json:"se"`
	CI      [][2]float64 `json:"ci95"`
	Cov     [][]float64  `json:"cov"`
	ResidSD float64      `json:"resid_sd"`
	R2      float64      `json:"r2"`
	DF      int          `json:"df"`
	T       float64      `json:"t"`
	Cond    float64      `json:"cond"`
	PosDef  bool         `json:"pos_def"`
}

func fitView(f *rolling.Fit) FitView {
	p := f.Model.Coefs()
	v := FitView{Model: f.Model.String(), Status: fitStatus(f), N: f.N, First: f.First, Last: f.Last,
		Coef: f.Coef[:p:p], SE: f.SE[:p:p], CI: f.CI[:p:p], ResidSD: f.ResidSD, R2: f.R2, DF: f.DF, T: f.TCrit,
		Cond: f.Cond, PosDef: f.PosDef}
	for i := range p {
		v.Cov = append(v.Cov, f.Cov[i][:p:p])
	}
	return v
}

// CurvePoint is the fitted model at one time with its 95% confidence
// band of the mean.
type CurvePoint struct {
	T    time.Time `json:"t"`
	Fit  float64   `json:"fit"`
	Low  float64   `json:"low"`
	High float64   `json:"high"`
}

// WindowView is one window of a sensor at the time asked for, from its
// newest fit record at or before then.
type WindowView struct {
	Window   string    `json:"window"`
	Record   time.Time `json:"record_time"`
	N        int       `json:"n"`
	Panes    int       `json:"panes"`
	Filled   int       `json:"filled"`
	Coverage float64   `json:"coverage"`
	Judged   bool      `json:"judged"`
	Reason   string    `json:"reason,omitempty"`
	// JudgedBy says where the verdict comes from: JudgedByService or
	// JudgedByStoredFit; empty when no judgement was made (no rule, the
	// window is not in it, or its fit is from before a calibration).
	// Judgement holds the numbers behind it.
	JudgedBy  string           `json:"judged_by,omitempty"`
	Judgement *alert.Judgement `json:"judgement,omitempty"`
	// Fit is the fit of the model the class judges; Line the line fit
	// (level and drift rate) whatever the model.
	Fit  FitView `json:"fit"`
	Line FitView `json:"line"`
	// Exit is the trend's predicted exit from tolerance, if any.
	Exit *Exit `json:"exit,omitempty"`
	// Curve samples Fit over the window, then ahead to the end of the
	// chart (Ahead marks the first sample past the newest reading).
	Curve []CurvePoint `json:"curve"`
	Ahead int          `json:"ahead"`
	// PaneMeans are the panes of the readings the stored state holds
	// for the window, at or before the time asked for, with the
	// residuals against Fit; PaneMeansNote says what of the record's
	// readings is not among them, and why.
	PaneMeans     []PaneView `json:"pane_means"`
	PaneMeansNote string     `json:"pane_means_note,omitempty"`

	spec  rolling.WindowSpec
	sol   rolling.Solution
	model rolling.Model // of Fit
}

// HistoryRow is one fit record: the line fit's level and drift rate, and
// the judged model's coefficients and residual SD.
type HistoryRow struct {
	Time     time.Time  `json:"time"`
	Window   string     `json:"window"`
	N        int        `json:"n"`
	Coverage float64    `json:"coverage"`
	Status   string     `json:"status"`
	Level    float64    `json:"level"`
	LevelSE  float64    `json:"level_se"`
	Drift    float64    `json:"drift_per_day"`
	DriftSE  float64    `json:"drift_se"`
	DriftCI  [2]float64 `json:"drift_ci95"`
	Model    string     `json:"model"`
	Coef     []float64  `json:"coef"`
	ResidSD  float64    `json:"resid_sd"`
	R2       float64    `json:"r2"`
}

// Limits are the class's limits in report units (unit/day, unit/day²,
// days); zero means not set.
type Limits struct {
	SlopeWarning      float64 `json:"slope_warning_per_day,omitempty"`
	SlopeCritical     float64 `json:"slope_critical_per_day,omitempty"`
	CurvatureWarning  float64 `json:"curvature_warning_per_day2,omitempty"`
	CurvatureCritical float64 `json:"curvature_critical_per_day2,omitempty"`
	DoublingWarning   float64 `json:"doubling_warning_days,omitempty"`
	DoublingCritical  float64 `json:"doubling_critical_days,omitempty"`
	LeadTimeWarning   float64 `json:"lead_time_warning_days,omitempty"`
	LeadTimeCritical  float64 `json:"lead_time_critical_days,omitempty"`
}

// SensorView is the JSON of /api/sensors/{id}: everything the sensor page
// shows, as it stood at AsOf.
type SensorView struct {
	ID     string    `json:"id"`
	AsOf   time.Time `json:"as_of"`
	Live   bool      `json:"live"` // AsOf is the time of the request
	Class  string    `json:"class,omitempty"`
	Unit   string    `json:"unit,omitempty"`
	Rule   bool      `json:"rule"`
	Model  string    `json:"model"`
	State  string    `json:"state"`
	Reason string    `json:"reason,omitempty"`

	Tolerance float64     `json:"tolerance,omitempty"`
	AsLeft    *AsLeft     `json:"as_left,omitempty"`
	Band      *[2]float64 `json:"tolerance_band,omitempty"`
	Limits    Limits      `json:"limits"`

	Windows      []WindowView      `json:"windows"`
	Alerts       []OpenAlert       `json:"alerts"`
	Events       []alert.Event     `json:"events"`
	Tickets      []TicketView      `json:"tickets"`
	Calibrations []CalibrationView `json:"calibrations"`
	History      []HistoryRow      `json:"history"`

	// From and To are the chart's time axis.
	From time.Time `json:"from"`
	To   time.Time `json:"to"`

	Unreadable int `json:"unreadable_values,omitempty"`
}

// curveSamples over a window; enough for a smooth parabola at page width.
const curveSamples = 60

func (h *handler) sensor(id string, asof time.Time, live bool) (*SensorView, error) {
	db := h.o.DB
	r, hasRule := h.rule(id)
	v := &SensorView{ID: id, AsOf: asof, Live: live, Class: r.Class, Unit: r.Unit, Rule: hasRule,
		Alerts: []OpenAlert{}, Events: []alert.Event{}, Tickets: []TicketView{}, Calibrations: []CalibrationView{},
		History: []HistoryRow{}, Windows: []WindowView{}}
	jm, tm := rolling.Line, rolling.Line
	if hasRule {
		jm, tm = chart.JudgedModel(&r), chart.TrendModel(&r)
	}
	v.Model = jm.String()

	var want []rolling.WindowSpec
	if hasRule {
		want = r.Windows
	}
	recs, err := latestRecords(db, id, asof, want)
	if err != nil {
		return nil, err
	}
	log, err := readLog(db, id, asof)
	if err != nil {
		return nil, err
	}
	v.Unreadable = log.unreadable
	if len(recs) == 0 && len(log.events[id]) == 0 && len(log.tickets[id]) == 0 && len(log.cals[id]) == 0 {
		known := false
		_ = db.History(id, rolling.WindowSpec{}, time.Time{}, time.Time{}, func(store.HistoryRecord) error {
			known = true
			return errStop
		})
		if !known {
			return nil, ErrUnknownSensor
		}
	}
	if evs := log.events[id]; evs != nil {
		v.Events = evs
	}
	if a := openAlerts(log.events[id]); a != nil {
		v.Alerts = a
	}
	if tks := ticketsAt(log.tickets[id], log.cals[id], asof); tks != nil {
		v.Tickets = tks
	}
	if cals := calibrationsAt(log.cals[id], v.Tickets, v.Events, asof); cals != nil {
		v.Calibrations = cals
	}
	if hasRule {
		v.Tolerance = r.Tolerance
		v.Limits = Limits{
			SlopeWarning: r.Limits.Slope.Warning, SlopeCritical: r.Limits.Slope.Critical,
			CurvatureWarning: r.Limits.Curvature.Warning, CurvatureCritical: r.Limits.Curvature.Critical,
			DoublingWarning: days(r.Limits.Doubling.Warning), DoublingCritical: days(r.Limits.Doubling.Critical),
			LeadTimeWarning: days(r.Limits.LeadTime.Warning), LeadTimeCritical: days(r.Limits.LeadTime.Critical),
		}
		if v.AsLeft, err = h.asLeftAt(id, &r, v.Calibrations, asof); err != nil {
			return nil, err
		}
		if v.AsLeft != nil && r.Tolerance > 0 {
			v.Band = &[2]float64{v.AsLeft.Value - r.Tolerance, v.AsLeft.Value + r.Tolerance}
		}
	}

	// The time axis: twice the longest window back from the newest
	// record (or from the first reading, if later), and a sixth of that
	// ahead for the projection.
	var longest time.Duration
	var newest time.Time
	for w, sol := range recs {
		longest = max(longest, w.Span)
		if sol.Last.After(newest) {
			newest = sol.Last
		}
	}
	if newest.IsZero() {
		newest = asof
	}
	if longest == 0 {
		longest = 7 * day
	}
	v.From = newest.Add(-2 * longest)
	// Start where the data start, if later.
	err = db.History(id, rolling.WindowSpec{}, v.From, after1(asof), func(rec store.HistoryRecord) error {
		if f := rec.Solution.First; f.After(v.From) {
			v.From = f.Add(-newest.Sub(f) / 50)
		}
		return errStop
	})
	if err != nil && !errors.Is(err, errStop) {
		return nil, err
	}
	v.To = newest.Add(newest.Sub(v.From) / 6)

	var verdicts map[rolling.WindowSpec]verdict
	if hasRule {
		var svc map[string]alert.Judgement
		if live {
			svc = h.serviceJudgements(func(s string) bool { return s == id })[id]
		}
		verdicts = judgeWindows(&r, recs, svc, lastCalibration(v.Calibrations, asof))
	}
	// The readings behind the fits: the panes of the stored state.
	stored, _, loadErr := db.LoadSensor(id)
	if loadErr != nil {
		h.o.Logger.Warn().Err(loadErr).Str("sensor", id).Msg("stored panes unreadable")
	}
	var reasons []string
	judgedAny := false
	serial := serialOf(recs)
	for _, w := range sortedWindows(recs) {
		sol := withSerial(recs[w], serial) // drawn as judged
		wv := WindowView{Window: alert.WindowName(w), Record: sol.Last, N: sol.N, Panes: sol.Panes, Filled: sol.Filled,
			Coverage: sol.Coverage(), Fit: fitView(sol.Fit(jm)), Line: fitView(&sol.Line), spec: w, sol: sol, model: jm}
		if hasRule {
			vd := verdicts[w]
			wv.Judged, wv.Reason, wv.JudgedBy, wv.Judgement = vd.judged, vd.reason, vd.by, vd.j
			if wv.Judged {
				judgedAny = true
			} else {
				reasons = append(reasons, wv.Window+": "+wv.Reason)
			}
			if wv.Judged && v.AsLeft != nil && r.Tolerance > 0 {
				wv.Exit = exitOf(sol.Fit(tm), v.AsLeft.Value, r.Tolerance, horizon(&r))
			}
		} else {
			wv.Reason = "no rule"
		}
		if loadErr != nil {
			wv.PaneMeans, wv.PaneMeansNote = []PaneView{}, "the stored readings could not be read: "+loadErr.Error()
		} else {
			wv.PaneMeans, wv.PaneMeansNote = h.panesOf(stored, &sol, sol.Fit(jm), asof)
		}
		if f := sol.Fit(jm); f.OK() && !f.First.IsZero() {
			// A window's trend says little beyond half its span ahead: a
			// one-day slope carried ten days would dwarf the data.
			until := v.To
			if lim := f.Last.Add(w.Span / 2); lim.Before(until) {
				until = lim
			}
			wv.Curve, wv.Ahead = curve(f, until)
		}
		v.Windows = append(v.Windows, wv)
	}
	for _, w := range want {
		if _, ok := recs[w]; !ok {
			reasons = append(reasons, alert.WindowName(w)+": no fit record yet")
		}
	}
	switch {
	case !hasRule:
		v.State, v.Reason = StateNoRule, "no rule"
	case judgedAny:
		v.State = StateJudged
	default:
		v.State, v.Reason = StateNotJudged, strings.Join(reasons, "; ")
	}

	err = db.History(id, rolling.WindowSpec{}, v.From, after1(asof), func(rec store.HistoryRecord) error {
		sol := &rec.Solution
		f := sol.Fit(jm)
		l := &sol.Line
		p := f.Model.Coefs()
		v.History = append(v.History, HistoryRow{Time: sol.Last, Window: alert.WindowName(sol.Window), N: sol.N,
			Coverage: sol.Coverage(), Status: fitStatus(f), Level: l.Coef[0], LevelSE: l.SE[0], Drift: l.Coef[1],
			DriftSE: l.SE[1], DriftCI: l.CI[1], Model: f.Model.String(), Coef: slices.Clone(f.Coef[:p]),
			ResidSD: f.ResidSD, R2: f.R2})
		return nil
	})
	if err != nil {
		return nil, err
	}
	return v, nil
}

// curve samples f from its first reading to its newest, then on to
// until (not beyond): the fitted model over the window and its
// projection. ahead is the index of the first projected sample.
func curve(f *rolling.Fit, until time.Time) ([]CurvePoint, int) {
	span := f.Last.Sub(f.First)
	var pts []CurvePoint
	for i := range curveSamples + 1 {
		t := f.First.Add(time.Duration(float64(span) * float64(i) / curveSamples))
		y, lo, hi := band(f, days(t.Sub(f.Last)))
		pts = append(pts, CurvePoint{T: t, Fit: y, Low: lo, High: hi})
	}
	ahead := len(pts)
	if ext := until.Sub(f.Last); ext > 0 {
		const aheadSamples = 20
		for i := 1; i <= aheadSamples; i++ {
			t := f.Last.Add(time.Duration(float64(ext) * float64(i) / aheadSamples))
			y, lo, hi := band(f, days(t.Sub(f.Last)))
			pts = append(pts, CurvePoint{T: t, Fit: y, Low: lo, High: hi})
		}
	}
	return pts, ahead
}
