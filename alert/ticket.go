package alert

import (
	"time"

	"driftfit/rolling"
)

// Ticket asks for a sensor to be recalibrated. Its JSON encoding is the
// wire format on NATS and for webhooks.
//
// A ticket opens when an alert of a kind in Rule.TicketKinds (by default
// Slope and LeadTime) is raised, at either severity (a warning is the
// time to plan the work; waiting for critical would spend the margin),
// and no ticket of the sensor is open. It stays open until
// Tracker.Calibrate closes it; later alerts do not open a second one.
//
// # Due date
//
// Due is the one-sided 95% lower confidence bound of the time the fitted
// mean of the trend (the rule's trend model, on the window that raised the
// alert) reaches the tolerance edge it heads for (ExitLowerBound, from
// rolling.Fit.MeanTimeToLimit with the serially corrected covariance:
// Fieller's bound for a line, the inverted confidence band of the mean
// for a parabola), minus the rule's TicketMargin, and never before Opened.
// For a line the bound is the earliest of the window's and those of the
// lines over the window's newest half and newest quarter
// (rolling.Solution.Recent; DueBasis "exit_lower_bound_recent"), since a
// drift that began inside the window bends the whole window's line
// towards a later exit.
// So the sensor's mean is still inside tolerance at Due, less the margin,
// with 95% confidence. When no bound exists (the rate towards the edge is
// not significant at the one-sided 95% level, or the bound lies beyond the
// rule's horizon) no date can be bounded, and Due is the evaluation time
// plus the lead-time warning level (else its critical level, else the
// horizon). DueBasis says which: "already_out" (the fitted mean is beyond
// the edge: due at once), "exit_lower_bound", "exit_lower_bound_recent",
// "unbounded_lead_time" or
// "unbounded_horizon".
//
// # Revisions
//
// Each evaluation of the ticket's window that is judged re-estimates the
// due date from the new fit. The ticket is revised when Due moves sooner
// by more than a day or a quarter of the time it had left, whichever is
// more; when it moves later by more than a week or a quarter of that
// time and the new lower bound lies beyond the previous fitted exit (the
// new evidence contradicts the old date); and when it falls overdue. A
// revision counts up Revision, sets AsOf to the evaluation time and every
// estimate to the new one, and Decision.Revised carries it. An estimate
// without a bound never revises a bounded one (weaker evidence does not
// push a date out), nor is an overdue ticket revised while it stays
// overdue. Our choice, from TestDetection_PlantNoise (40 drifts of twice
// the slope warning level in white noise, ticket to exit about 200 days):
// revising whenever the date moved by more than a tenth of the time left
// gave a median of 63 revisions a ticket, mostly the noise of a sliding
// window's estimate; these rules give 9, and the last revision still
// falls due before the exit (40 of 40), a median of 17.6 days before. Overdue says that Due had passed at AsOf (a ticket
// due at once is not overdue as opened; its window's next evaluation
// revises it as overdue).
//
// # Amendments
//
// A ticket closed by a calibration that is later voided reopens as it
// stood when closed (Tracker.Void), its estimates as of AsOf; one closed
// by a calibration later corrected stays closed, by the correction
// (Tracker.Correct). Either counts up Revision and appends an Amendment.
type Ticket struct {
	ID       string    `json:"id"` // sensor id + "@" + Opened in compact UTC
	Sensor   string    `json:"sensor"`
	Class    string    `json:"class,omitempty"`
	Opened   time.Time `json:"opened"`
	Reason   Kind      `json:"reason"`
	Severity Severity  `json:"severity"`
	Window   string    `json:"window"`
	Unit     string    `json:"unit"`

	AsLeft    float64    `json:"as_left"`
	Tolerance float64    `json:"tolerance"`
	Span      [2]float64 `json:"span,omitzero"` // calibrated range, if given

	// Revision is 0 as opened and counts the revisions since; AsOf is when
	// the estimates below were made (Opened, then each revision's
	// evaluation time). Overdue reports that AsOf was after Due.
	Revision int       `json:"revision"`
	AsOf     time.Time `json:"as_of"`
	Overdue  bool      `json:"overdue"`

	// Crossing is rolling.CrossKind's name for the fitted mean at the
	// edge it heads for: "ahead", "never" (within the horizon) or
	// "already past"; Edge is "upper" or "lower".
	Crossing string `json:"crossing"`
	Edge     string `json:"edge"`
	// Exit is when the fitted mean leaves the band (zero unless ahead);
	// ExitLowerBound the one-sided 95% lower confidence bound of that time
	// (zero when there is none); ExitCI Fieller's two-sided 95% interval
	// of it (Line only, zero unless bounded; it may begin in the past).
	// EarliestExit is when the 95% prediction band of single readings
	// first touches the edge (zero if not within the horizon): when a
	// reading may first be found out, always sooner than the mean.
	Exit           time.Time    `json:"exit,omitzero"`
	ExitLowerBound time.Time    `json:"exit_lower_bound,omitzero"`
	ExitCI         [2]time.Time `json:"exit_ci95,omitzero"`
	EarliestExit   time.Time    `json:"earliest_exit,omitzero"`
	Due            time.Time    `json:"due"`
	DueBasis       string       `json:"due_basis"`

	// AsFound is the expected deviation from the as-left value at Due,
	// with the 95% prediction interval of a single reading there (what a
	// technician may find), labelled by its Interval.
	AsFound Estimate `json:"as_found"`
	// Evidence is the trend fit the due date comes from.
	Evidence FitSummary `json:"evidence"`

	// Calibration closed the ticket; nil while open.
	Calibration *Calibration `json:"calibration,omitempty"`
	// Amendments lists, oldest first, the calibrations that closed the
	// ticket and were voided since (each reopened it) or corrected (the
	// correction is Calibration); each counted up Revision.
	Amendments []Amendment `json:"amendments,omitempty"`
	Caution    string      `json:"caution"`
}

// Due bases (Ticket.DueBasis).
const (
	DueAlreadyOut       = "already_out"
	DueExitLowerBound   = "exit_lower_bound"
	DueRecentLowerBound = "exit_lower_bound_recent"
	DueUnboundedLead    = "unbounded_lead_time"
	DueUnboundedHorizon = "unbounded_horizon"
)

// PredictionInterval labels Estimate.Interval: the 95% prediction
// interval of a single reading (rolling.Prediction).
const PredictionInterval = "prediction_95"

// Estimate is a predicted deviation from the as-left value, in Unit, with
// its interval [Low, High]: the 95% prediction interval of a single
// reading (rolling.Prediction less the as-left), Interval
// PredictionInterval.
type Estimate struct {
	Deviation float64 `json:"deviation"`
	Low       float64 `json:"low"`
	High      float64 `json:"high"`
	Interval  string  `json:"interval"`
}

// FitSummary is the evidence of a ticket: one fit of one window, with
// coefficients on τ in days from Last (c0 the level at Last, in Unit).
// Coef, SE and CI hold the model's coefficients (2 or 3).
type FitSummary struct {
	Model    string       `json:"model"`
	N        int          `json:"n"`
	First    time.Time    `json:"first"`
	Last     time.Time    `json:"last"`
	Coverage float64      `json:"coverage"`
	Coef     []float64    `json:"coef"`
	SE       []float64    `json:"se"`
	CI       [][2]float64 `json:"ci95"`
	ResidSD  float64      `json:"resid_sd"`
	R2       float64      `json:"r2"`
	Cond     float64      `json:"cond"`
}

// Calibration is a recalibration of a sensor: the value found before
// adjustment and the value it was left at, in the sensor's unit.
type Calibration struct {
	Time    time.Time `json:"time"`
	AsFound float64   `json:"as_found"`
	AsLeft  float64   `json:"as_left"`
}

func summarize(f *rolling.Fit, coverage float64) FitSummary {
	p := f.Model.Coefs()
	s := FitSummary{
		Model: f.Model.String(), N: f.N, First: utc(f.First), Last: utc(f.Last), Coverage: coverage,
		Coef: make([]float64, p), SE: make([]float64, p), CI: make([][2]float64, p),
		ResidSD: f.ResidSD, R2: f.R2, Cond: f.Cond,
	}
	copy(s.Coef, f.Coef[:p])
	copy(s.SE, f.SE[:p])
	copy(s.CI, f.CI[:p])
	return s
}

// openTicket builds the ticket for an alert of kind k at severity sev,
// raised at now on a window whose trend fit is f.
func (t *Tracker) openTicket(now time.Time, w rolling.WindowSpec, coverage float64, f *rolling.Fit, recent [2]*rolling.Fit, k Kind, sev Severity) Ticket {
	r := &t.rule
	tk := Ticket{
		ID: t.sensor + "@" + now.Format("20060102T150405Z"), Sensor: t.sensor, Class: r.Class,
		Opened: now, Reason: k, Severity: sev, Window: windowLabel(w), Unit: r.Unit,
		AsLeft: t.asLeft, Tolerance: r.Tolerance, Span: [2]float64{r.SpanLower, r.SpanUpper},
		Caution: Caution,
	}
	t.estimate(&tk, now, coverage, f, recent)
	return tk
}

// estimate fills the estimates of tk (AsOf to AsFound) from trend fit f
// at evaluation time now; recent are the lines over the newest half and
// quarter of the same window (nil: none), whose bound replaces the line's
// when it comes sooner (see recentBound).
func (t *Tracker) estimate(tk *Ticket, now time.Time, coverage float64, f *rolling.Fit, recent [2]*rolling.Fit) {
	r := &t.rule
	tk.AsOf, tk.Evidence = now, summarize(f, coverage)
	tk.Exit, tk.ExitLowerBound, tk.ExitCI, tk.EarliestExit = time.Time{}, time.Time{}, [2]time.Time{}, time.Time{}
	mc, upper, ok := r.meanExit(f, t.asLeft)
	tk.Crossing, tk.Edge = mc.Kind.String(), "lower"
	limit := t.asLeft - r.Tolerance
	if upper {
		tk.Edge, limit = "upper", t.asLeft+r.Tolerance
	}
	last := utc(f.Last)
	at := func(d float64) time.Time { return last.Add(time.Duration(d * float64(day))) }
	if cr, err := f.TimeToLimit(limit, upper, r.Horizon); err == nil && cr.EarliestOK {
		tk.EarliestExit = last.Add(cr.Earliest)
	}
	if ok && mc.Kind == rolling.CrossAhead {
		tk.Exit = at(mc.Days)
	}
	if ok && mc.LowerOK {
		tk.ExitLowerBound = at(mc.LowerDays)
	}
	fromRecent := false
	if ok && mc.Kind != rolling.CrossPast {
		if d, okR := r.recentBound(recent, t.asLeft, upper); okR && (!mc.LowerOK || d < mc.LowerDays) {
			tk.ExitLowerBound, fromRecent = at(d), true
		}
	}
	if ok && mc.IntervalOK {
		tk.ExitCI = [2]time.Time{at(mc.LowDays), at(mc.HighDays)}
	}
	switch {
	case ok && mc.Kind == rolling.CrossPast:
		tk.Due, tk.DueBasis = now, DueAlreadyOut
	case fromRecent:
		tk.Due, tk.DueBasis = tk.ExitLowerBound.Add(-r.TicketMargin), DueRecentLowerBound
	case ok && mc.LowerOK:
		tk.Due, tk.DueBasis = tk.ExitLowerBound.Add(-r.TicketMargin), DueExitLowerBound
	default:
		if lt := r.Limits.LeadTime.lowest(); lt > 0 {
			tk.Due, tk.DueBasis = now.Add(lt), DueUnboundedLead
		} else {
			tk.Due, tk.DueBasis = now.Add(r.Horizon), DueUnboundedHorizon
		}
	}
	if tk.Due.Before(tk.Opened) {
		tk.Due = tk.Opened
	}
	tk.Overdue = now.After(tk.Due)
	tk.AsFound = Estimate{Interval: PredictionInterval}
	if p, err := f.Predict(tk.Due); err == nil {
		tk.AsFound = Estimate{Deviation: p.Value - t.asLeft, Low: p.Low - t.asLeft, High: p.High - t.asLeft, Interval: PredictionInterval}
	}
}

// laterMin is the least move of a due date to later that revises a
// ticket (see Ticket, Revisions).
const laterMin = 7 * day

// bounded reports whether the due date of tk rests on evidence: the mean
// is out or its exit has a lower bound.
func (tk *Ticket) bounded() bool {
	return tk.DueBasis == DueAlreadyOut || tk.DueBasis == DueExitLowerBound || tk.DueBasis == DueRecentLowerBound
}

// revise re-estimates the open ticket from trend fit f of its window,
// judged at now, and returns the revision, or nil when there is none
// (see Ticket, Revisions).
func (t *Tracker) revise(now time.Time, coverage float64, f *rolling.Fit, recent [2]*rolling.Fit) *Ticket {
	old := &t.ticket
	if !now.After(old.AsOf) {
		return nil
	}
	next := *old
	t.estimate(&next, now, coverage, f, recent)
	left := old.Due.Sub(now)
	sooner := old.Due.Sub(next.Due) > max(day, left/4)
	later := next.Due.Sub(old.Due) > max(laterMin, left/4) && !old.Exit.IsZero() && next.ExitLowerBound.After(old.Exit)
	switch {
	case old.bounded() && !next.bounded(), !sooner && !later:
		return t.markOverdue(now)
	case old.Overdue && next.Overdue:
		return nil
	}
	next.Revision = old.Revision + 1
	t.ticket = next
	tk := next
	return &tk
}

// markOverdue revises the open ticket, its estimates unchanged, when its
// due date has passed at now and it is not flagged yet; else nil.
func (t *Tracker) markOverdue(now time.Time) *Ticket {
	tk := &t.ticket
	if tk.Overdue || !now.After(tk.Due) {
		return nil
	}
	tk.Overdue, tk.AsOf, tk.Revision = true, now, tk.Revision+1
	c := *tk
	return &c
}
