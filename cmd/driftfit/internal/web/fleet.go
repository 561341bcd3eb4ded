package web

import (
	"cmp"
	"math"
	"net/url"
	"slices"
	"strings"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/chart"
	"driftfit/rolling"
)

// Judgement states of a sensor.
const (
	StateJudged    = "judged"
	StateNotJudged = "not_judged"
	StateNoRule    = "no_rule"
)

// TicketBrief is the open ticket of a fleet row.
type TicketBrief struct {
	ID       string    `json:"id"`
	Due      time.Time `json:"due"`
	Reason   string    `json:"reason"`
	Severity string    `json:"severity"`
}

// FleetRow is one sensor of the fleet, with what ranks it.
type FleetRow struct {
	// Rank is the place in the whole fleet, most urgent 1, whatever the
	// filter.
	Rank  int    `json:"rank"`
	ID    string `json:"id"`
	Href  string `json:"href"`
	Class string `json:"class,omitempty"`
	Unit  string `json:"unit,omitempty"`
	// State is "judged", "not_judged" or "no_rule"; Reason says why not
	// judged, per window ("30d/1d: too few readings 12 < 20").
	State  string `json:"state"`
	Reason string `json:"reason,omitempty"`
	// Ticket is the open recalibration ticket, if any.
	Ticket *TicketBrief `json:"ticket,omitempty"`
	// Exit is the soonest predicted exit from tolerance over the judged
	// windows' trend fits; ExitWindow the window it comes from.
	Exit       *Exit  `json:"exit,omitempty"`
	ExitWindow string `json:"exit_window,omitempty"`
	// ToleranceUsed is |level − as-left| / tolerance on the longest
	// judged window (1: at the edge of the band).
	ToleranceUsed *float64 `json:"tolerance_used,omitempty"`
	// Significance is the largest |slope|/SE of the line fits of the
	// judged windows, on the serially corrected SE where the gates use it; Drift is that slope, in Unit per day, and Window
	// its window.
	Significance *float64 `json:"significance,omitempty"`
	Drift        *float64 `json:"drift_per_day,omitempty"`
	Window       string   `json:"window,omitempty"`
	// Alerts firing at the time asked for.
	Alerts []OpenAlert `json:"alerts"`
	// Last is the time of the newest fit record.
	Last time.Time `json:"last,omitzero"`
}

// FleetCounts are the totals shown at the top of the fleet page, over
// the whole fleet, before filtering; Shown counts the rows that passed
// the filter.
type FleetCounts struct {
	Sensors     int `json:"sensors"`
	Judged      int `json:"judged"`
	NotJudged   int `json:"not_judged"`
	NoRule      int `json:"no_rule"`
	OpenTickets int `json:"open_tickets"`
	Firing      int `json:"firing_alerts"`
	Shown       int `json:"shown"`
}

// Fleet is the JSON of /api/fleet.
type Fleet struct {
	AsOf       time.Time   `json:"as_of"`
	Counts     FleetCounts `json:"counts"`
	Classes    []string    `json:"classes"`
	Sensors    []FleetRow  `json:"sensors"`
	Unreadable int         `json:"unreadable_values,omitempty"`
}

// fleetFilter selects rows: Q a pattern of ids (* and ?; without them a
// substring), Class a class name, State a judgement state.
type fleetFilter struct {
	Q, Class, State string
}

func sensorHref(id string) string { return "/sensors/" + url.PathEscape(id) }

// fleetCacheFor is how long a fleet computed for "now" is served again:
// several open fleet pages polling share one pass over the store.
const fleetCacheFor = 2 * time.Second

// fleet returns the rows that pass flt, ranked over the whole fleet.
func (h *handler) fleet(asof time.Time, live bool, flt fleetFilter) (*Fleet, error) {
	var all *Fleet
	if live {
		h.mu.Lock()
		if h.cached != nil && asof.Sub(h.cached.AsOf) >= 0 && asof.Sub(h.cached.AsOf) < fleetCacheFor {
			all = h.cached
		}
		h.mu.Unlock()
	}
	if all == nil {
		var err error
		if all, err = h.fleetAll(asof, live); err != nil {
			return nil, err
		}
		if live {
			h.mu.Lock()
			h.cached = all
			h.mu.Unlock()
		}
	}
	f := *all
	f.Sensors = []FleetRow{}
	for _, row := range all.Sensors {
		if globMatch(flt.Q, row.ID) && (flt.Class == "" || flt.Class == row.Class) && (flt.State == "" || flt.State == row.State) {
			f.Sensors = append(f.Sensors, row)
		}
	}
	f.Counts.Shown = len(f.Sensors)
	return &f, nil
}

// fleetAll ranks every sensor the store knows of; live says asof is
// now, when the service's judgements are the verdicts. The result is
// shared by requests: read only.
func (h *handler) fleetAll(asof time.Time, live bool) (*Fleet, error) {
	db := h.o.DB
	log, err := readLog(db, "", asof)
	if err != nil {
		return nil, err
	}
	var svc map[string]map[string]alert.Judgement
	if live {
		svc = h.serviceJudgements(nil)
	}
	ids := map[string]bool{}
	err = db.HistorySensors(func(id string) error { ids[id] = true; return nil })
	if err != nil {
		return nil, err
	}
	for id := range log.tickets {
		ids[id] = true
	}
	for id := range log.events {
		ids[id] = true
	}
	f := &Fleet{AsOf: asof, Unreadable: log.unreadable, Sensors: []FleetRow{}, Classes: []string{}}
	classes := map[string]bool{}
	for id := range ids {
		row, err := h.fleetRow(id, asof, log, svc[id])
		if err != nil {
			return nil, err
		}
		if err := checkID(id); err != nil {
			// Listed, so nothing stored is hidden, but without a link: the
			// sensor page refuses the id.
			row.Href, row.Reason = "", err.Error()
		}
		f.Counts.Sensors++
		switch row.State {
		case StateJudged:
			f.Counts.Judged++
		case StateNotJudged:
			f.Counts.NotJudged++
		default:
			f.Counts.NoRule++
		}
		if row.Ticket != nil {
			f.Counts.OpenTickets++
		}
		f.Counts.Firing += len(row.Alerts)
		if row.Class != "" {
			classes[row.Class] = true
		}
		f.Sensors = append(f.Sensors, row)
	}
	slices.SortFunc(f.Sensors, compareUrgency)
	for i := range f.Sensors {
		f.Sensors[i].Rank = i + 1
	}
	f.Counts.Shown = len(f.Sensors)
	for c := range classes {
		f.Classes = append(f.Classes, c)
	}
	slices.Sort(f.Classes)
	return f, nil
}

func (h *handler) rule(id string) (alert.Rule, bool) {
	if h.o.Rule == nil {
		return alert.Rule{}, false
	}
	return h.o.Rule(id)
}

func (h *handler) fleetRow(id string, asof time.Time, log *eventLog, svc map[string]alert.Judgement) (FleetRow, error) {
	r, hasRule := h.rule(id)
	row := FleetRow{ID: id, Href: sensorHref(id), Class: r.Class, Unit: r.Unit, Alerts: []OpenAlert{}}
	var want []rolling.WindowSpec
	if hasRule {
		want = r.Windows
	}
	recs, err := latestRecords(h.o.DB, id, asof, want)
	if err != nil {
		return row, err
	}
	for _, sol := range recs {
		if sol.Last.After(row.Last) {
			row.Last = sol.Last
		}
	}
	if a := openAlerts(log.events[id]); a != nil {
		row.Alerts = a
	}
	tks := ticketsAt(log.tickets[id], log.cals[id], asof)
	for _, tk := range tks {
		if tk.Open && (row.Ticket == nil || tk.Due.Before(row.Ticket.Due)) {
			row.Ticket = &TicketBrief{ID: tk.ID, Due: tk.Due, Reason: tk.Reason.String(), Severity: tk.Severity.String()}
		}
	}
	if !hasRule {
		row.State, row.Reason = StateNoRule, "no rule"
		return row, nil
	}
	cals := calibrationsAt(log.cals[id], tks, log.events[id], asof)
	asLeft, err := h.asLeftAt(id, &r, cals, asof)
	if err != nil {
		return row, err
	}
	tm := chart.TrendModel(&r)
	verdicts := judgeWindows(&r, recs, svc, lastCalibration(cals, asof))
	var reasons []string
	var longest *rolling.Solution
	serial := serialOf(recs)
	for _, w := range r.Windows {
		sol, ok := recs[w]
		if ok {
			sol = withSerial(sol, serial)
		}
		if !ok {
			reasons = append(reasons, alert.WindowName(w)+": no fit record yet")
			continue
		}
		if vd := verdicts[w]; !vd.judged {
			reasons = append(reasons, alert.WindowName(w)+": "+vd.reason)
			continue
		}
		if longest == nil || w.Span > longest.Window.Span {
			s := sol
			longest = &s
		}
		line := &sol.Line
		se := line.SE[1]
		if line.Pairs > 0 && line.SerialErr == nil {
			se = line.SEAdj[1] // as the gates judge it
		}
		if line.OK() && se > 0 {
			z := math.Abs(line.Coef[1]) / se
			if row.Significance == nil || z > *row.Significance {
				row.Significance, row.Drift, row.Window = finite(z), finite(line.Coef[1]), alert.WindowName(w)
			}
		}
		if asLeft != nil && r.Tolerance > 0 {
			if trending(sol.Fit(tm)) {
				if e := exitOf(sol.Fit(tm), asLeft.Value, r.Tolerance, horizon(&r)); e != nil && (row.Exit == nil || e.At.Before(row.Exit.At)) {
					row.Exit, row.ExitWindow = e, alert.WindowName(w)
				}
			}
		}
	}
	if longest == nil {
		row.State, row.Reason = StateNotJudged, strings.Join(reasons, "; ")
		return row, nil
	}
	row.State = StateJudged
	if asLeft != nil && r.Tolerance > 0 {
		if f := longest.Fit(tm); f.OK() {
			row.ToleranceUsed = finite(math.Abs(f.Coef[0]-asLeft.Value) / r.Tolerance)
		}
	}
	return row, nil
}

// trending says the fit's rate is told apart from none: the 95%
// interval of the slope (or, for a parabola, of the slope or the
// curvature) excludes zero. An exit predicted from a trend that is not
// is noise and does not rank a sensor.
func trending(f *rolling.Fit) bool {
	excl := func(ci [2]float64) bool { return ci[0] > 0 || ci[1] < 0 }
	if f.Model == rolling.Parabola {
		return excl(f.CI[1]) || excl(f.CI[2])
	}
	return excl(f.CI[1])
}

// compareUrgency orders the fleet, most urgent first: sensors with an
// open ticket by due date, then by predicted exit from tolerance, then by
// the share of tolerance used (largest first), then by drift significance
// (largest first), then by id.
func compareUrgency(a, b FleetRow) int {
	if c := cmpPresent(a.Ticket != nil, b.Ticket != nil); c != 0 {
		return c
	}
	if a.Ticket != nil {
		if c := a.Ticket.Due.Compare(b.Ticket.Due); c != 0 {
			return c
		}
	}
	if c := cmpPresent(a.Exit != nil, b.Exit != nil); c != 0 {
		return c
	}
	if a.Exit != nil {
		if c := a.Exit.At.Compare(b.Exit.At); c != 0 {
			return c
		}
	}
	if c := cmpLarger(a.ToleranceUsed, b.ToleranceUsed); c != 0 {
		return c
	}
	if c := cmpLarger(a.Significance, b.Significance); c != 0 {
		return c
	}
	return cmp.Compare(a.ID, b.ID)
}

// cmpPresent puts the row that has something first.
func cmpPresent(a, b bool) int {
	switch {
	case a && !b:
		return -1
	case b && !a:
		return 1
	}
	return 0
}

// cmpLarger puts the larger value first and missing values last.
func cmpLarger(a, b *float64) int {
	if c := cmpPresent(a != nil, b != nil); c != 0 || a == nil {
		return c
	}
	return cmp.Compare(*b, *a)
}
