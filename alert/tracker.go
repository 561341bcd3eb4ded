package alert

import (
	"fmt"
	"math"
	"slices"
	"time"

	"driftfit/rolling"
)

// Tracker holds the alert state of one sensor: one state machine per
// (window, kind), the as-left value, the last calibration and the open
// ticket. It makes decisions only; the caller delivers and stores what
// it returns, and persists the state with MarshalBinary.
//
// A Tracker is not safe for concurrent use; give each sensor one owner.
type Tracker struct {
	sensor string
	rule   Rule

	asLeft     float64
	hasAsLeft  bool
	calibrated time.Time // zero: never
	machines   []machine // in order of first evaluation
	ticket     Ticket
	hasTicket  bool

	// The serial-correlation estimate of the sensor's window with the
	// most pairs (its Parabola fit's R1 and Pairs), kept across
	// evaluations and calibrations (it describes the noise, not an
	// alert); see withSerial.
	serialR1    float64
	serialPairs uint32
	serialWin   rolling.WindowSpec

	alpha [][]float64 // per window and kind, from the budget; not state
}

// machine is the state of the alert of one (window, kind).
type machine struct {
	window  rolling.WindowSpec
	kind    Kind
	state   State
	sev     Severity  // while Firing
	streak  uint32    // consecutive breaching evaluations, any severity
	crit    uint32    // consecutive evaluations breaching Critical
	since   time.Time // when it last started firing; zero: never
	cleared time.Time // when it last cleared; zero: never
}

// Decision is what one Evaluate or Calibrate call decided.
type Decision struct {
	// Events in the order the limits were judged (slope, curvature,
	// doubling, lead time).
	Events []Event
	// Opened is the ticket this evaluation opened, if any.
	Opened *Ticket
	// Closed is the ticket a calibration closed, if any.
	Closed *Ticket
	// Revised is the open ticket when an evaluation of its window revised
	// it: its due date moved materially or it fell overdue (see Ticket,
	// Revisions). The caller publishes and stores it like an opening.
	Revised *Ticket
	// Reopened is the ticket a voided calibration reopened (Void).
	Reopened *Ticket
	// Prior is what Calibrate or Correct replaced: what Void or a later
	// Correct of that calibration restores. The caller keeps it with its
	// record of the calibration.
	Prior *Prior
	// Judgement says whether Evaluate judged the window, or why not;
	// zero for Observe and Calibrate.
	Judgement Judgement
}

// Status is a snapshot of one alert, as listed by Tracker.Alerts.
type Status struct {
	Window   rolling.WindowSpec
	Kind     Kind
	State    State
	Severity Severity  // while Firing
	Since    time.Time // last raised; zero: never
	Cleared  time.Time // last cleared; zero: never
}

// NewTracker returns the tracker of a sensor under rule r, with zero
// fields of r set to their defaults. It returns an error wrapping
// ErrBadRule, joining a *RuleError per invalid field, when r is invalid.
func NewTracker(sensor string, r Rule) (*Tracker, error) {
	rr, err := r.resolve()
	if err != nil {
		return nil, fmt.Errorf("alert: sensor %s: %w", sensor, err)
	}
	rr.Windows = append([]rolling.WindowSpec(nil), rr.Windows...)
	if rr.TicketKinds != nil {
		rr.TicketKinds = append([]Kind{}, rr.TicketKinds...)
	}
	return &Tracker{sensor: sensor, rule: rr, asLeft: rr.AsLeft, hasAsLeft: rr.HasAsLeft, alpha: rr.alphas()}, nil
}

// Rule returns the tracker's rule with defaults filled in.
func (t *Tracker) Rule() Rule {
	r := t.rule
	r.Windows = append([]rolling.WindowSpec(nil), r.Windows...)
	if r.TicketKinds != nil {
		r.TicketKinds = append([]Kind{}, r.TicketKinds...)
	}
	return r
}

// AsLeft returns the centre of the tolerance band, and false while it is
// not known yet (no rule value and no usable fit so far).
func (t *Tracker) AsLeft() (float64, bool) { return t.asLeft, t.hasAsLeft }

// Calibrated returns the time of the last calibration; zero when none.
func (t *Tracker) Calibrated() time.Time { return t.calibrated }

// Ticket returns the open ticket, if any.
func (t *Tracker) Ticket() (Ticket, bool) { return t.ticket, t.hasTicket }

// Alerts returns the state of every alert evaluated so far, in the order
// they were first evaluated.
func (t *Tracker) Alerts() []Status {
	out := make([]Status, len(t.machines))
	for i, m := range t.machines {
		out[i] = Status{Window: m.window, Kind: m.kind, State: m.state, Severity: m.sev, Since: m.since, Cleared: m.cleared}
	}
	return out
}

// Evaluate judges the fits of one window's solution at time now, usually
// when the window closes a pane, and returns the events and the ticket
// it decided on.
//
// Gates: a window with fewer than MinReadings readings or less than
// MinCoverage of its panes filled is not evaluated, nor is a fit that is
// not OK, not positive definite, has fewer than MinReadings readings or a
// condition number above MaxCond. A limit not evaluated gives no evidence:
// it breaks a pending debounce run but does not clear a firing alert.
//
// Per (window, kind): Debounce consecutive breaching evaluations raise the
// alert, at Critical if the critical level was breached on all of them,
// else Warning; a firing warning escalates after Debounce consecutive
// critical breaches; a firing alert clears when its clear statistic drops
// below ClearFraction × the lowest level (severity never steps down while
// firing); after clearing it cannot be raised again until Cooldown has
// passed. The statistics of each kind are described in doc.go.
//
// Errors: ErrBadTime for a zero or unrepresentable now, ErrUnknownWindow
// for a window not in the rule, ErrStale for a solution holding readings
// from before the last calibration. The state is unchanged on error.
func (t *Tracker) Evaluate(now time.Time, sol *rolling.Solution) (Decision, error) {
	return t.evaluate(now, sol, nil)
}

// EvaluatePeers is Evaluate for a peer-group member whose solution is of
// its deviation from the group's reference: when fewer than need
// members were usable for the reference (live < need), the window is not
// judged (PeersIncomplete) and gives no evidence, since the deviation
// then holds the process changes the group is meant to cancel.
func (t *Tracker) EvaluatePeers(now time.Time, sol *rolling.Solution, live, need int) (Decision, error) {
	return t.evaluate(now, sol, &[2]int{live, need})
}

func (t *Tracker) evaluate(now time.Time, sol *rolling.Solution, peers *[2]int) (Decision, error) {
	var d Decision
	if !timeOK(now) {
		return d, fmt.Errorf("%w: evaluation time %v", ErrBadTime, now)
	}
	now = utc(now)
	r := &t.rule
	wi := r.window(sol.Window)
	if wi < 0 {
		return d, fmt.Errorf("%w: sensor %s window %s", ErrUnknownWindow, t.sensor, WindowName(sol.Window))
	}
	if !t.calibrated.IsZero() && sol.N > 0 && sol.First.Before(t.calibrated) {
		return d, fmt.Errorf("%w: sensor %s window %s first reading %v, calibrated %v",
			ErrStale, t.sensor, WindowName(sol.Window), utc(sol.First), t.calibrated)
	}
	sol = t.withSerial(sol)
	trend := r.trend(sol)
	d.Judgement = r.judgement(sol, trend)
	if peers != nil && peers[0] < peers[1] && d.Judgement.OK() {
		d.Judgement.Reason, d.Judgement.Live, d.Judgement.Need = PeersIncomplete, peers[0], peers[1]
	}
	judged := d.Judgement.OK()
	if !t.hasAsLeft && judged {
		t.asLeft, t.hasAsLeft = trend.Coef[0], true
	}

	for _, k := range Kinds() {
		info := k.info()
		if !info.fit || !info.on(r) {
			continue
		}
		m := t.machine(sol.Window, k)
		var ev evidence
		if judged {
			ev = info.evidence(t, &judging{sol: sol, trend: trend, firing: m.state == Firing, alpha: t.alpha[wi][k] * float64(r.Debounce)})
		}
		was := m.sev
		typ := m.step(now, &ev, uint32(r.Debounce), r.Cooldown)
		if typ == EventUnknown {
			continue
		}
		e := t.event(typ, now, sol.Window, m, k, &ev)
		if typ == Cleared {
			e.Severity = was
		}
		d.Events = append(d.Events, e)
		if typ == Raised && r.opensTicket(k) && !t.hasTicket && t.hasAsLeft && r.usable(trend) {
			t.ticket, t.hasTicket = t.openTicket(now, sol.Window, sol.Coverage(), trend, r.recentOf(sol, trend), k, m.sev), true
			tk := t.ticket
			d.Opened = &tk
		}
	}
	if t.hasTicket && d.Opened == nil && t.ticket.Window == windowLabel(sol.Window) {
		if judged {
			d.Revised = t.revise(now, sol.Coverage(), trend, r.recentOf(sol, trend))
		} else {
			d.Revised = t.markOverdue(now) // no new estimate, but the date may have passed
		}
	}
	return d, nil
}

// withSerial keeps the serial-correlation estimate of the sensor's
// window with the most pairs, and returns sol carrying that estimate
// (rolling.Solution.WithSerial) when sol's own is smaller, or unknown,
// and rests on fewer pairs; else sol.
//
// A short window's own lag-1 autocorrelation is biased low and spread
// wide when the noise's correlation time is not small against the window:
// its residuals about a fitted trend have lost the slow part of the
// noise. On AR(1) noise of φ 0.9 read every 10 minutes, the 1-day
// window's own estimate (143 pairs) let it judge and open 2 false slope
// tickets in 11 sensor-years (TestDetection_PlantNoise before the drift),
// where the 30-day window's 4,319 pairs say n_e = 7.6, too few to judge
// (FewEffective). Taking the larger r1 never narrows an interval.
// rolling.Sensor.SolveJudged borrows only when a window has fewer than
// rolling.MinPairs pairs; this goes on from there. A solution that
// carries no serial information (Pairs 0) is left alone.
func (t *Tracker) withSerial(sol *rolling.Solution) *rolling.Solution {
	s := Serial{R1: t.serialR1, Pairs: int(t.serialPairs), Window: t.serialWin}.took(sol)
	t.serialR1, t.serialPairs, t.serialWin = s.R1, uint32(s.Pairs), s.Window
	return s.lend(sol)
}

// OpenTicket opens the ticket of the firing alert of kind k on sol's
// window, for a caller that decides on tickets itself: a peer-group
// member whose rule sets TicketKinds to an empty slice, so that raises
// of its deviation open none, gets its ticket once Attribute returns
// PeerAttributed for it. It opens nothing (a zero Decision) when that
// alert is not firing, a ticket is already open, the as-left value is
// not known, or the trend fit is not usable. Errors: ErrBadTime,
// ErrUnknownWindow, ErrStale as for Evaluate.
func (t *Tracker) OpenTicket(now time.Time, sol *rolling.Solution, k Kind) (Decision, error) {
	var d Decision
	if !timeOK(now) {
		return d, fmt.Errorf("%w: ticket time %v", ErrBadTime, now)
	}
	now = utc(now)
	r := &t.rule
	if r.window(sol.Window) < 0 {
		return d, fmt.Errorf("%w: sensor %s window %s", ErrUnknownWindow, t.sensor, WindowName(sol.Window))
	}
	if !t.calibrated.IsZero() && sol.N > 0 && sol.First.Before(t.calibrated) {
		return d, fmt.Errorf("%w: sensor %s window %s first reading %v, calibrated %v",
			ErrStale, t.sensor, WindowName(sol.Window), utc(sol.First), t.calibrated)
	}
	sol = t.withSerial(sol)
	trend := r.trend(sol)
	var m *machine
	for i := range t.machines {
		if t.machines[i].window == sol.Window && t.machines[i].kind == k {
			m = &t.machines[i]
		}
	}
	if m == nil || m.state != Firing || t.hasTicket || !t.hasAsLeft || !r.usable(trend) {
		return d, nil
	}
	t.ticket, t.hasTicket = t.openTicket(now, sol.Window, sol.Coverage(), trend, r.recentOf(sol, trend), k, m.sev), true
	tk := t.ticket
	d.Opened = &tk
	return d, nil
}

// machine returns the state machine of (w, k), adding it if new.
func (t *Tracker) machine(w rolling.WindowSpec, k Kind) *machine {
	for i := range t.machines {
		if m := &t.machines[i]; m.window == w && m.kind == k {
			return m
		}
	}
	t.machines = append(t.machines, machine{window: w, kind: k, state: Inactive})
	return &t.machines[len(t.machines)-1]
}

// step advances the machine by one evaluation and returns the event it
// causes, or EventUnknown.
func (m *machine) step(now time.Time, ev *evidence, k uint32, cooldown time.Duration) EventType {
	if !ev.valid {
		m.streak, m.crit = 0, 0
		if m.state != Firing {
			m.state = m.idle(now, cooldown)
		}
		return EventUnknown
	}
	if ev.sev != SeverityUnknown {
		m.streak = min(m.streak+1, math.MaxUint32-1)
	} else {
		m.streak = 0
	}
	if ev.sev == Critical {
		m.crit = min(m.crit+1, math.MaxUint32-1)
	} else {
		m.crit = 0
	}
	if m.state == Firing {
		switch {
		case ev.sev == SeverityUnknown && ev.clear:
			m.state, m.sev, m.cleared = Resolved, SeverityUnknown, now
			m.streak, m.crit = 0, 0
			if cooldown == 0 {
				m.state = Inactive
			}
			return Cleared
		case m.sev == Warning && m.crit >= k:
			m.sev = Critical
			return Escalated
		}
		return EventUnknown
	}
	if m.streak >= k && !m.cooling(now, cooldown) {
		m.state, m.since, m.sev = Firing, now, Warning
		if m.crit >= k {
			m.sev = Critical
		}
		return Raised
	}
	if m.streak > 0 {
		m.state = Pending
	} else {
		m.state = m.idle(now, cooldown)
	}
	return EventUnknown
}

func (m *machine) cooling(now time.Time, cooldown time.Duration) bool {
	return !m.cleared.IsZero() && now.Sub(m.cleared) < cooldown
}

func (m *machine) idle(now time.Time, cooldown time.Duration) State {
	if m.cooling(now, cooldown) {
		return Resolved
	}
	return Inactive
}

// event builds the event of a transition of machine m.
func (t *Tracker) event(typ EventType, now time.Time, w rolling.WindowSpec, m *machine, k Kind, ev *evidence) Event {
	e := Event{
		Type: typ, Sensor: t.sensor, Class: t.rule.Class, Window: windowLabel(w),
		Kind: k, Severity: m.sev, State: m.state, At: now,
		Value: ev.value, CI: ev.ci, Limit: ev.limit, Unit: reportUnit(k, t.rule.Unit),
		BeyondHorizon: ev.beyond, Caution: Caution,
	}
	if k.FitKind() {
		switch typ {
		case Cleared:
			e.Limit = t.rule.level(k, SeverityUnknown)
		case Raised, Escalated:
			e.Limit = t.rule.level(k, m.sev)
		}
	}
	if f := ev.fit; f != nil {
		e.Model, e.N, e.First, e.Last = f.Model.String(), f.N, utc(f.First), utc(f.Last)
	}
	return e
}

// Calibrate records a calibration of the sensor: it closes the open
// ticket (returned in Decision.Closed), ends every firing alert with a
// Reset event, forgets all alert state including cooldowns, and takes
// c.AsLeft as the new centre of the tolerance band. Decision.Prior holds
// what Void needs to withdraw it.
//
// The caller must restart the sensor's fits from c.Time (new rolling
// sensors); until then Evaluate refuses solutions with older readings
// (ErrStale). Errors: ErrBadTime for a zero or unrepresentable time,
// ErrBadCalibration for a non-finite value or a time before the previous
// calibration. The state is unchanged on error.
func (t *Tracker) Calibrate(c Calibration) (Decision, error) {
	var d Decision
	c, err := t.checkCalibration(c, t.calibrated)
	if err != nil {
		return d, err
	}
	p := t.prior()
	d.Events = t.reset(c.Time)
	if t.hasTicket {
		cc := c
		t.ticket.Calibration = &cc
		closed := t.ticket
		d.Closed = &closed
		p.Closed = &closed
		t.ticket, t.hasTicket = Ticket{}, false
	}
	t.asLeft, t.hasAsLeft, t.calibrated = c.AsLeft, true, c.Time
	d.Prior = &p
	return d, nil
}

// Prior is the part of a tracker's state a calibration replaced and
// nothing later recomputes: the centre of the tolerance band and the
// calibration time before it, and the ticket it closed, as closed. Alert
// states are not part of it: a calibration forgets them for good (the
// fits they judged restart with it).
type Prior struct {
	AsLeft     float64   `json:"as_left"`
	HasAsLeft  bool      `json:"has_as_left"`
	Calibrated time.Time `json:"calibrated,omitzero"` // zero: none before
	Closed     *Ticket   `json:"closed,omitempty"`
}

// Amendment actions (Amendment.Action).
const (
	AmendVoided    = "voided"
	AmendCorrected = "corrected"
)

// Amendment records that the calibration which closed a ticket was
// voided (which reopened the ticket) or corrected (Ticket.Calibration is
// then the correction) at At, with the operator's reason if given.
type Amendment struct {
	Action      string      `json:"action"`
	At          time.Time   `json:"at"`
	Calibration Calibration `json:"calibration"` // as it stood before
	Reason      string      `json:"reason,omitempty"`
}

// Void withdraws the sensor's last calibration, whose Calibrate (or
// Correct) returned p, at time at: the centre of the band and the
// calibration time go back to p's, and the ticket it closed (p.Closed)
// reopens, as it stood when closed, with a new Revision and an
// Amendment, unless another ticket has opened since (that one then
// carries the request for the work). Decision.Reopened is the reopened
// ticket. The alerts the calibration reset stay reset, and the fits it
// restarted are not brought back: the evidence gathered since is judged
// against the restored centre from the next evaluation on.
//
// The caller keeps the order: p must come from the calibration in force.
// Errors: ErrBadTime for a bad at, ErrBadCalibration for a p holding a
// non-finite centre. The state is unchanged on error.
func (t *Tracker) Void(at time.Time, p Prior, reason string) (Decision, error) {
	var d Decision
	if !timeOK(at) {
		return d, fmt.Errorf("%w: void time %v", ErrBadTime, at)
	}
	if !finite(p.AsLeft) {
		return d, fmt.Errorf("%w: sensor %s prior as-left %v: must be finite", ErrBadCalibration, t.sensor, p.AsLeft)
	}
	if p.Closed != nil && p.Closed.Calibration != nil && !t.hasTicket {
		tk := amend(p.Closed, AmendVoided, utc(at), reason)
		tk.Calibration = nil
		t.ticket, t.hasTicket = tk, true
		d.Reopened = &tk
	}
	t.asLeft, t.hasAsLeft, t.calibrated = p.AsLeft, p.HasAsLeft, utc(p.Calibrated)
	return d, nil
}

// Correct replaces the sensor's last calibration, old, whose Calibrate
// (or Correct) returned p, by c, at time at: c.AsLeft becomes the centre
// and c.Time the calibration time. The ticket old closed (p.Closed) is
// closed by c instead, with a new Revision and an Amendment, and comes
// back in Decision.Closed. When c.Time is after old.Time the caller must
// restart the fits from c.Time again, and firing alerts end with Reset
// events as in Calibrate (they judged readings from before the work);
// otherwise alert states are kept. Decision.Prior is p with the amended
// ticket: what withdrawing c needs.
//
// Errors: ErrBadTime for a bad at or c.Time, ErrBadCalibration for a
// non-finite value or a c.Time before the calibration before old
// (p.Calibrated). The state is unchanged on error.
func (t *Tracker) Correct(at time.Time, old, c Calibration, p Prior, reason string) (Decision, error) {
	var d Decision
	if !timeOK(at) {
		return d, fmt.Errorf("%w: correction time %v", ErrBadTime, at)
	}
	c, err := t.checkCalibration(c, utc(p.Calibrated))
	if err != nil {
		return d, err
	}
	if c.Time.After(utc(old.Time)) {
		d.Events = t.reset(c.Time)
	}
	if p.Closed != nil && p.Closed.Calibration != nil {
		tk := amend(p.Closed, AmendCorrected, utc(at), reason)
		cc := c
		tk.Calibration = &cc
		d.Closed = &tk
		p.Closed = &tk
	}
	t.asLeft, t.hasAsLeft, t.calibrated = c.AsLeft, true, c.Time
	d.Prior = &p
	return d, nil
}

// checkCalibration validates c against the calibration time before it
// (zero: none) and returns it in UTC.
func (t *Tracker) checkCalibration(c Calibration, before time.Time) (Calibration, error) {
	if !timeOK(c.Time) {
		return c, fmt.Errorf("%w: calibration time %v", ErrBadTime, c.Time)
	}
	c.Time = utc(c.Time)
	if !finite(c.AsFound) || !finite(c.AsLeft) {
		return c, fmt.Errorf("%w: sensor %s as-found %v, as-left %v: must be finite", ErrBadCalibration, t.sensor, c.AsFound, c.AsLeft)
	}
	if !before.IsZero() && c.Time.Before(before) {
		return c, fmt.Errorf("%w: sensor %s time %v before the previous calibration %v", ErrBadCalibration, t.sensor, c.Time, before)
	}
	return c, nil
}

// prior returns the state a calibration replaces.
func (t *Tracker) prior() Prior {
	return Prior{AsLeft: t.asLeft, HasAsLeft: t.hasAsLeft, Calibrated: t.calibrated}
}

// reset ends every firing alert with a Reset event at at and forgets all
// alert state.
func (t *Tracker) reset(at time.Time) []Event {
	var evs []Event
	for i := range t.machines {
		m := &t.machines[i]
		if m.state == Firing {
			evs = append(evs, Event{
				Type: Reset, Sensor: t.sensor, Class: t.rule.Class, Window: windowLabel(m.window),
				Kind: m.kind, Severity: m.sev, State: Inactive, At: at,
				Unit: reportUnit(m.kind, t.rule.Unit), Caution: Caution,
			})
		}
	}
	t.machines = nil
	return evs
}

// amend returns a copy of the closed ticket tk with an amendment of its
// closing calibration and the next revision.
func amend(tk *Ticket, action string, at time.Time, reason string) Ticket {
	out := *tk
	ev := &out.Evidence // shared with tk otherwise
	ev.Coef, ev.SE, ev.CI = slices.Clone(ev.Coef), slices.Clone(ev.SE), slices.Clone(ev.CI)
	out.Amendments = append(slices.Clone(tk.Amendments),
		Amendment{Action: action, At: at, Calibration: *tk.Calibration, Reason: reason})
	out.Revision++
	return out
}
