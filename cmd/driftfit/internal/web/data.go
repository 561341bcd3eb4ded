package web

import (
	"encoding/json"
	"errors"
	"math"
	"slices"
	"sort"
	"strings"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/chart"
	"driftfit/cmd/driftfit/internal/query"
	"driftfit/rolling"
	"driftfit/store"
)

// errStop ends a store walk early; never returned to callers.
var errStop = errors.New("web: stop walk")

// after1 is the exclusive end of a walk that includes T itself.
func after1(t time.Time) time.Time { return t.Add(time.Nanosecond) }

// latestRecords returns, per window, the newest fit record of id at or
// before asof. It looks back a few days first, then two months, then the
// whole history, stopping as soon as every window it expects (the rule's,
// when it has one) has a record: a live sensor writes a record every
// pane, so the first look is usually enough.
func latestRecords(db *store.DB, id string, asof time.Time, want []rolling.WindowSpec) (map[rolling.WindowSpec]rolling.Solution, error) {
	found := map[rolling.WindowSpec]rolling.Solution{}
	for _, back := range []time.Duration{3 * day, 62 * day, 0} {
		var since time.Time
		if back > 0 {
			since = asof.Add(-back)
		}
		clear(found)
		err := db.History(id, rolling.WindowSpec{}, since, after1(asof), func(r store.HistoryRecord) error {
			found[r.Solution.Window] = r.Solution
			return nil
		})
		if err != nil {
			return nil, err
		}
		all := len(found) > 0
		for _, w := range want {
			if _, ok := found[w]; !ok {
				all = false
			}
		}
		if all && (len(want) > 0 || back > 3*day) {
			break
		}
	}
	return found, nil
}

// eventLog holds the alert events, tickets and calibration records read
// from the store, by sensor.
type eventLog struct {
	events     map[string][]alert.Event
	tickets    map[string][]alert.Ticket
	cals       map[string][]query.Calibration
	unreadable int // stored values that did not decode
}

// readLog reads events up to asof, every ticket and every calibration
// record (of all sensors, or of one when id is not empty).
func readLog(db *store.DB, id string, asof time.Time) (*eventLog, error) {
	l := &eventLog{events: map[string][]alert.Event{}, tickets: map[string][]alert.Ticket{}, cals: map[string][]query.Calibration{}}
	recs, err := query.Records(db, id)
	var skipped *store.SkippedError
	if err != nil && !errors.As(err, &skipped) {
		return nil, err
	}
	for _, r := range recs {
		if r.Damaged {
			l.unreadable++
		}
		l.cals[r.Sensor] = append(l.cals[r.Sensor], r)
	}
	err = db.Events(time.Time{}, after1(asof), func(_ time.Time, data []byte) error {
		var ev alert.Event
		if err := json.Unmarshal(data, &ev); err != nil {
			l.unreadable++
			return nil
		}
		if id == "" || ev.Sensor == id {
			l.events[ev.Sensor] = append(l.events[ev.Sensor], ev)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	err = db.Tickets(func(_ string, data []byte) error {
		var tk alert.Ticket
		if err := json.Unmarshal(data, &tk); err != nil {
			l.unreadable++
			return nil
		}
		if id == "" || tk.Sensor == id {
			l.tickets[tk.Sensor] = append(l.tickets[tk.Sensor], tk)
		}
		return nil
	})
	return l, err
}

// OpenAlert is an alert firing at the time asked for.
type OpenAlert struct {
	Class    string    `json:"class,omitempty"`
	Window   string    `json:"window"`
	Kind     string    `json:"kind"`
	Severity string    `json:"severity"`
	Since    time.Time `json:"since"`
	Value    float64   `json:"value"`
	Limit    float64   `json:"limit"`
	Unit     string    `json:"unit"`
}

// openAlerts replays events (in time order, all at or before the time
// asked for) per class, window and kind: raised and escalated alerts are
// open until cleared or reset.
func openAlerts(evs []alert.Event) []OpenAlert {
	type key struct {
		class, window string
		kind          alert.Kind
	}
	open := map[key]*OpenAlert{}
	var order []key
	for _, ev := range evs {
		k := key{ev.Class, ev.Window, ev.Kind}
		switch ev.Type {
		case alert.Raised, alert.Escalated:
			a, ok := open[k]
			if !ok {
				a = &OpenAlert{Class: ev.Class, Window: ev.Window, Kind: ev.Kind.String(), Since: ev.At}
				open[k] = a
				order = append(order, k)
			}
			a.Severity, a.Value, a.Limit, a.Unit = ev.Severity.String(), ev.Value, ev.Limit, ev.Unit
		case alert.Cleared, alert.Reset:
			delete(open, k)
		}
	}
	var out []OpenAlert
	for _, k := range order {
		if a, ok := open[k]; ok {
			out = append(out, *a)
			delete(open, k) // a key re-raised after clearing is listed once
		}
	}
	return out
}

// TicketView is a recalibration ticket as it stood at the time asked
// for: closed by the calibration that closed it then, and open when
// none had. An amendment after that time is undone (a ticket reopened
// later by a void shows closed by the calibration voided); a
// calibration done after the time, or, where the sensor's records tell,
// recorded after it, is not shown. Its estimates and revision are the
// stored ones.
type TicketView struct {
	alert.Ticket
	Open bool `json:"open"`
}

// ticketsAt returns the tickets opened at or before asof, newest first;
// recs are the sensor's calibration records.
func ticketsAt(tks []alert.Ticket, recs []query.Calibration, asof time.Time) []TicketView {
	var earliest time.Time // of the records: before it, tickets alone tell
	for _, r := range recs {
		if !r.Damaged && (earliest.IsZero() || r.Time.Before(earliest)) {
			earliest = r.Time
		}
	}
	// recorded says whether a record of a calibration at ct that closed
	// ticket id was stored at or before asof.
	recorded := func(id string, ct time.Time) bool {
		for _, r := range recs {
			if !r.Damaged && r.Time.Equal(ct) && !r.Recorded.After(asof) && slices.Contains(r.Closed, id) {
				return true
			}
		}
		return false
	}
	var out []TicketView
	for _, tk := range tks {
		if tk.Opened.After(asof) {
			continue
		}
		for i, a := range tk.Amendments {
			if a.At.After(asof) {
				c := a.Calibration // as it stood before the amendment
				tk.Calibration, tk.Amendments = &c, tk.Amendments[:i:i]
				break
			}
		}
		if c := tk.Calibration; c != nil && (c.Time.After(asof) ||
			!earliest.IsZero() && !c.Time.Before(earliest) && !recorded(tk.ID, c.Time)) {
			tk.Calibration = nil
		}
		out = append(out, TicketView{Ticket: tk, Open: tk.Calibration == nil})
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Opened.After(out[j].Opened) })
	return out
}

// CalibrationView is a recorded calibration (see chart.Calibration).
type CalibrationView = chart.Calibration

// calibrationsAt returns the calibrations of a sensor as they stood at
// asof, in time order (query.CalibrationsAt): from its records, else
// from its tickets as they stood then (tks) and its events up to then.
func calibrationsAt(recs []query.Calibration, tks []TicketView, evs []alert.Event, asof time.Time) []CalibrationView {
	plain := make([]alert.Ticket, len(tks))
	for i := range tks {
		plain[i] = tks[i].Ticket
	}
	return query.CalibrationsAt(recs, plain, evs, asof)
}

// AsLeft is the centre of the tolerance band and where it comes from.
type AsLeft struct {
	Value float64 `json:"value"`
	// Source is "calibration", "configuration" or "first judged fit".
	Source string `json:"source"`
	// Since is the time of the calibration or of the fit it comes from.
	Since time.Time `json:"since,omitzero"`
}

// asLeftAt finds the as-left value at asof as the alert rules take it:
// the last standing calibration's, else the configured one, else the
// level of the first trend fit since the last standing calibration that
// passes the gates.
func (h *handler) asLeftAt(id string, r *alert.Rule, cals []CalibrationView, asof time.Time) (*AsLeft, error) {
	var from time.Time
	for i := len(cals) - 1; i >= 0; i-- {
		if !cals[i].Stands() {
			continue
		}
		if cals[i].AsLeft != nil {
			return &AsLeft{Value: *cals[i].AsLeft, Source: "calibration", Since: cals[i].Time}, nil
		}
		if from.IsZero() {
			from = cals[i].Time
		}
	}
	if r.HasAsLeft {
		return &AsLeft{Value: r.AsLeft, Source: "configuration"}, nil
	}
	key := id + "\x00" + from.UTC().Format(time.RFC3339Nano)
	h.mu.Lock()
	c, ok := h.firstLevel[key]
	h.mu.Unlock()
	if ok {
		if c.Since.After(asof) {
			return nil, nil
		}
		return &c, nil
	}
	got, err := firstJudgedLevel(h.o.DB, id, r, from)
	if err != nil {
		return nil, err
	}
	if got == nil {
		return nil, nil
	}
	h.mu.Lock()
	h.firstLevel[key] = *got
	h.mu.Unlock()
	if got.Since.After(asof) {
		return nil, nil
	}
	return got, nil
}

// firstJudgedLevel returns the level of the trend fit of the first fit
// record of id from from on that the rule judges (alert.Judge, with the
// serial estimate of the sensor's windows as they stood then), as the
// tracker takes its as-left value; nil when none is judged.
func firstJudgedLevel(db *store.DB, id string, r *alert.Rule, from time.Time) (*AsLeft, error) {
	var got *AsLeft
	latest := map[rolling.WindowSpec]*rolling.Solution{}
	var sols []*rolling.Solution
	err := db.History(id, rolling.WindowSpec{}, from, time.Time{}, func(rec store.HistoryRecord) error {
		sol := rec.Solution
		if sol.N > 0 && sol.First.Before(from) {
			return nil // holds readings from before the calibration
		}
		latest[sol.Window] = &sol
		sols = sols[:0]
		for _, s := range latest {
			sols = append(sols, s)
		}
		if j, err := alert.Judge(*r, &sol, alert.SerialOf(sols...)); err == nil && j.OK() {
			f := sol.Fit(chart.TrendModel(r))
			if !f.OK() {
				f = &sol.Line // judged on the line, as the tracker falls back
			}
			got = &AsLeft{Value: f.Coef[0], Source: "first judged fit", Since: sol.Last}
			return errStop
		}
		return nil
	})
	if errors.Is(err, errStop) {
		err = nil
	}
	return got, err
}

// finite returns a pointer to v, or nil for NaN and infinities, which
// JSON cannot carry.
func finite(v float64) *float64 {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return nil
	}
	return &v
}

// globMatch matches id against a pattern with * (any run) and ? (one
// character); an empty pattern matches everything, and a pattern without
// wildcards matches ids containing it.
func globMatch(pattern, id string) bool {
	if pattern == "" {
		return true
	}
	if !strings.ContainsAny(pattern, "*?") {
		return strings.Contains(id, pattern)
	}
	p, s := []rune(pattern), []rune(id)
	// Iterative matching with one backtrack point for the last star.
	pi, si, star, mark := 0, 0, -1, 0
	for si < len(s) {
		switch {
		case pi < len(p) && (p[pi] == '?' || p[pi] == s[si]):
			pi++
			si++
		case pi < len(p) && p[pi] == '*':
			star, mark = pi, si
			pi++
		case star >= 0:
			pi = star + 1
			mark++
			si = mark
		default:
			return false
		}
	}
	for pi < len(p) && p[pi] == '*' {
		pi++
	}
	return pi == len(p)
}

// sortedWindows returns the windows of m, shortest span first.
func sortedWindows(m map[rolling.WindowSpec]rolling.Solution) []rolling.WindowSpec {
	ws := make([]rolling.WindowSpec, 0, len(m))
	for w := range m {
		ws = append(ws, w)
	}
	slices.SortFunc(ws, func(a, b rolling.WindowSpec) int {
		if a.Span != b.Span {
			return int(a.Span - b.Span)
		}
		return int(a.Pane - b.Pane)
	})
	return ws
}
