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
// and no ticket of the sensor is open. It stays
// open until Tracker.Calibrate closes it; later alerts do not open a
// second one or change it.
//
// Due is when the fitted trend (of the rule's trend model, on the window
// that raised the alert) is predicted to leave the tolerance band, minus
// the rule's TicketMargin, and never before Opened. When the trend does
// not leave the band within the rule's horizon, Due is Opened plus the
// lead-time warning level (else its critical level, else the horizon).
// DueBasis says which: "already_out", "predicted_exit", "lead_time" or
// "horizon".
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

	// Crossing is rolling.CrossKind's name for the soonest band edge:
	// "ahead", "never" or "already past"; Edge is "upper" or "lower".
	Crossing string `json:"crossing"`
	Edge     string `json:"edge"`
	// Exit is when the fitted trend leaves the band (zero unless ahead);
	// EarliestExit when its 95% prediction band first touches the edge
	// (zero if not within the horizon).
	Exit         time.Time `json:"exit,omitzero"`
	EarliestExit time.Time `json:"earliest_exit,omitzero"`
	Due          time.Time `json:"due"`
	DueBasis     string    `json:"due_basis"`

	// AsFound is the expected deviation from the as-left value at Due.
	AsFound Estimate `json:"as_found"`
	// Evidence is the trend fit the due date comes from.
	Evidence FitSummary `json:"evidence"`

	// Calibration closed the ticket; nil while open.
	Calibration *Calibration `json:"calibration,omitempty"`
	Caution     string       `json:"caution"`
}

// Estimate is a predicted deviation from the as-left value, in Unit, with
// its 95% prediction interval (rolling.Prediction less the as-left).
type Estimate struct {
	Deviation float64 `json:"deviation"`
	Low       float64 `json:"low"`
	High      float64 `json:"high"`
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
func (t *Tracker) openTicket(now time.Time, w rolling.WindowSpec, coverage float64, f *rolling.Fit, k Kind, sev Severity) Ticket {
	r := &t.rule
	tk := Ticket{
		ID: t.sensor + "@" + now.Format("20060102T150405Z"), Sensor: t.sensor, Class: r.Class,
		Opened: now, Reason: k, Severity: sev, Window: windowLabel(w), Unit: r.Unit,
		AsLeft: t.asLeft, Tolerance: r.Tolerance, Span: [2]float64{r.SpanLower, r.SpanUpper},
		Evidence: summarize(f, coverage), Caution: Caution,
	}
	cr, upper, _ := r.crossing(f, t.asLeft)
	tk.Crossing, tk.Edge = cr.Kind.String(), "lower"
	if upper {
		tk.Edge = "upper"
	}
	last := utc(f.Last)
	if cr.EarliestOK {
		tk.EarliestExit = last.Add(cr.Earliest)
	}
	switch cr.Kind {
	case rolling.CrossPast:
		tk.Due, tk.DueBasis = now, "already_out"
	case rolling.CrossAhead:
		tk.Exit = last.Add(cr.At)
		tk.Due, tk.DueBasis = tk.Exit.Add(-r.TicketMargin), "predicted_exit"
	default:
		if lt := r.Limits.LeadTime.lowest(); lt > 0 {
			tk.Due, tk.DueBasis = now.Add(lt), "lead_time"
		} else {
			tk.Due, tk.DueBasis = now.Add(r.Horizon), "horizon"
		}
	}
	if tk.Due.Before(now) {
		tk.Due = now
	}
	if p, err := f.Predict(tk.Due); err == nil {
		tk.AsFound = Estimate{Deviation: p.Value - t.asLeft, Low: p.Low - t.asLeft, High: p.High - t.asLeft}
	}
	return tk
}
