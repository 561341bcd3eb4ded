package query

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/chart"
	"driftfit/cmd/driftfit/internal/report"
	"driftfit/ingest/readapi"
	"driftfit/rolling"
	"driftfit/store"
)

// errStop ends a store walk early; never returned to callers.
var errStop = errors.New("query: stop walk")

// Annotate returns what a picture of sensor's fit history from from to
// to draws besides the fits: the sensor's stored events, tickets and
// calibrations, the tolerance band and limits, and the models to show.
//
// rule is the sensor's rule from the configuration, nil without one;
// then the tolerance comes from the newest ticket, the limits from the
// levels the stored alerts were raised at, and the models from the
// kinds of those alerts. models, when not empty, are the models to show
// whatever the rule judges (history --model).
//
// The calibrations are the sensor's records as they stand now
// (CalibrationsAt); voided and corrected ones come marked. Each as-left
// value holds from a calibration that stands to the next: the
// calibration's own as-left when it is known; before the first
// calibration the configured as_left; else the as-left of a ticket
// opened in that time (the value the service judged against); else the
// level of the first fit in that time that passes the rule's evidence
// gates (alert.DefaultRule's without a rule), as the service takes it.
func Annotate(src Source, sensor string, rule *alert.Rule, models []rolling.Model, from, to time.Time) (*report.Annotations, error) {
	an := &report.Annotations{Trend: rolling.Line}
	var evs []alert.Event
	err := src.Events(time.Time{}, time.Time{}, func(_ time.Time, data []byte) error {
		ev, err := decodeEvent(data)
		if err != nil {
			return err
		}
		if ev.Sensor == sensor {
			evs = append(evs, ev)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	var tks []alert.Ticket
	err = src.Tickets(func(_ string, data []byte) error {
		tk, err := decodeTicket(data)
		if err != nil {
			return err
		}
		if tk.Sensor == sensor {
			tks = append(tks, tk)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	slices.SortStableFunc(tks, func(a, b alert.Ticket) int { return a.Opened.Compare(b.Opened) })
	an.Events, an.Tickets = evs, tks
	recs, err := Records(src, sensor)
	damaged := 0
	for _, r := range recs {
		if r.Damaged {
			damaged++
		}
	}
	var skipped *store.SkippedError
	var refused *readapi.ServiceError
	switch {
	case errors.Is(err, readapi.ErrNoAnswer):
		// A service of a build that keeps no records does not answer.
		recs = nil
		an.Notes = append(an.Notes, "no calibration records from the service: calibrations read from tickets and alert events, where a voided one looks like any other")
	case err != nil && !errors.As(err, &skipped) && !(errors.As(err, &refused) && damaged > 0):
		return nil, err
	}
	if damaged > 0 {
		// The file and the service alike pass a damaged record on with
		// its number; the walk's error then only says so.
		an.Notes = append(an.Notes, fmt.Sprintf("%d calibration records of the sensor could not be read", damaged))
	}
	an.Calibrations = CalibrationsAt(recs, tks, evs, time.Time{})

	gates := alert.DefaultRule()
	gates.Windows = nil // any window: the file's windows are the rule's
	// No gate reads the tolerance, but a rule without one is refused.
	gates.Tolerance = 1
	if rule != nil {
		gates = *rule
		an.Class = rule.Class
		an.Tolerance = rule.Tolerance
		an.Trend = chart.TrendModel(rule)
		l := &rule.Limits
		an.Limits = report.Limits{
			SlopeWarning: l.Slope.Warning, SlopeCritical: l.Slope.Critical,
			CurvatureWarning: l.Curvature.Warning, CurvatureCritical: l.Curvature.Critical,
			DoublingWarning: l.Doubling.Warning, DoublingCritical: l.Doubling.Critical,
		}
		an.Models = []rolling.Model{rolling.Line}
		if an.Trend == rolling.Parabola || l.Curvature.On() {
			an.Models = append(an.Models, rolling.Parabola)
		}
		if l.Doubling.On() {
			an.Models = append(an.Models, rolling.Exp)
		}
	} else {
		fromStored(an)
	}
	if len(models) > 0 {
		an.Models = models
	}
	an.AsLeft, err = asLefts(src, sensor, rule, &gates, an, from, to)
	if err != nil {
		return nil, err
	}
	return an, nil
}

// fromStored fills in the class, tolerance, limits and models from the
// stored tickets and events, for a sensor whose rule is not known.
func fromStored(an *report.Annotations) {
	models := []rolling.Model{rolling.Line}
	add := func(m rolling.Model) {
		if !slices.Contains(models, m) {
			models = append(models, m)
		}
	}
	for _, tk := range an.Tickets { // oldest first: the newest wins
		an.Tolerance = tk.Tolerance
		if tk.Class != "" {
			an.Class = tk.Class
		}
		if tk.Evidence.Model == rolling.Parabola.String() {
			an.Trend = rolling.Parabola
			add(rolling.Parabola)
		}
	}
	l := &an.Limits
	for _, ev := range an.Events {
		if an.Class == "" && ev.Class != "" && !strings.Contains(ev.Class, " vs ") {
			an.Class = ev.Class
		}
		if ev.Type != alert.Raised && ev.Type != alert.Escalated {
			continue
		}
		crit := ev.Severity == alert.Critical
		switch ev.Kind {
		case alert.Slope:
			setLevel(&l.SlopeWarning, &l.SlopeCritical, crit, ev.Limit)
		case alert.Curvature:
			setLevel(&l.CurvatureWarning, &l.CurvatureCritical, crit, ev.Limit)
			add(rolling.Parabola)
		case alert.Doubling:
			// The event's limit is the growth rate ln 2 / T in 1/d.
			if ev.Limit > 0 {
				d := time.Duration(math.Ln2 / ev.Limit * float64(24*time.Hour))
				if crit {
					l.DoublingCritical = d
				} else {
					l.DoublingWarning = d
				}
			}
			add(rolling.Exp)
		}
	}
	an.Models = models
}

func setLevel(warning, critical *float64, crit bool, v float64) {
	if crit {
		*critical = v
	} else {
		*warning = v
	}
}

// asLefts returns the as-left values in force from from to to, one per
// time between calibrations (see Annotate).
func asLefts(src Source, sensor string, rule *alert.Rule, gates *alert.Rule, an *report.Annotations, from, to time.Time) ([]report.AsLeft, error) {
	var cals []chart.Calibration
	for _, c := range an.Calibrations {
		if c.Stands() {
			cals = append(cals, c)
		}
	}
	var out []report.AsLeft
	for i := 0; i <= len(cals); i++ {
		var start, end time.Time // zero: open
		if i > 0 {
			start = cals[i-1].Time
		}
		if i < len(cals) {
			end = cals[i].Time
		}
		if (!end.IsZero() && !end.After(from)) || start.After(to) {
			continue
		}
		a := report.AsLeft{Since: start}
		switch {
		case i > 0 && cals[i-1].AsLeft != nil:
			a.Value, a.Source = *cals[i-1].AsLeft, "calibration "+start.UTC().Format(time.DateOnly)
		case i == 0 && rule != nil && rule.HasAsLeft:
			a.Value, a.Source = rule.AsLeft, "configuration"
		default:
			found := false
			for _, tk := range an.Tickets {
				if !tk.Opened.Before(start) && (end.IsZero() || tk.Opened.Before(end)) {
					a.Value, a.Source, found = tk.AsLeft, "ticket "+tk.Opened.UTC().Format(time.DateOnly), true
					break
				}
			}
			if found {
				break
			}
			v, at, ok, err := firstJudgedLevel(src, sensor, gates, an.Trend, start, end)
			if err != nil {
				return nil, err
			}
			if !ok {
				continue
			}
			a.Value, a.Source = v, "first judged fit "+at.UTC().Format("2006-01-02 15:04")
		}
		out = append(out, a)
	}
	return out, nil
}

// firstJudgedLevel returns the level of the first fit of model m from
// start (inclusive) to end (exclusive, zero: open) that the rule judges
// (alert.Judge, with the serial estimate of the sensor's windows as
// they stood then, as the tracker judges it); ok is false when none is.
// A rule without windows takes every window.
func firstJudgedLevel(src Source, sensor string, r *alert.Rule, m rolling.Model, start, end time.Time) (v float64, at time.Time, ok bool, err error) {
	latest := map[rolling.WindowSpec]*rolling.Solution{}
	var sols []*rolling.Solution
	err = src.History(sensor, rolling.WindowSpec{}, start, end, func(rec store.HistoryRecord) error {
		g := *r
		if len(g.Windows) == 0 {
			g.Windows = []rolling.WindowSpec{rec.Solution.Window}
		}
		sol := rec.Solution
		latest[sol.Window] = &sol
		sols = sols[:0]
		for _, s := range latest {
			sols = append(sols, s)
		}
		if j, err := alert.Judge(g, &sol, alert.SerialOf(sols...)); err == nil && j.OK() {
			f := sol.Fit(m)
			if !f.OK() {
				f = &sol.Line // judged on the line, as the tracker falls back
			}
			v, at, ok = f.Coef[0], sol.Last, true
			return errStop
		}
		return nil
	})
	if errors.Is(err, errStop) {
		err = nil
	}
	return v, at, ok, err
}
