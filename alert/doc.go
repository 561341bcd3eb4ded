// Package alert decides when a sensor's fitted drift deserves an alert or a
// recalibration ticket. It is pure: no I/O, no clock, no goroutines, no
// logging. The caller passes in each window's rolling.Solution with the
// time of evaluation, and delivers and stores what comes back.
//
// # Main types
//
// A Rule holds one sensor's settings (tolerance, windows, gates, debounce,
// hysteresis, cooldown, limits, detectors, alarm budget). A Tracker holds
// one sensor's state: a state machine per (window, kind), the as-left
// value, the last calibration and the open Ticket. Tracker.Evaluate
// judges a window's fits and returns Events (raised, escalated, cleared),
// any ticket it opened and the window's Judgement (judged, or why not);
// Tracker.Observe takes what a step or data-quality detector found;
// Tracker.Calibrate closes the ticket and resets the sensor. Judge gives
// the Judgement Evaluate would give a solution, from the serial estimate
// SerialOf takes from the sensor's windows, with no state: readers of
// stored fits use it to say what the service says. Event and
// Ticket marshal to JSON with snake_case keys: the wire format. The
// Tracker's state marshals to a canonical binary form for storage.
//
// The detectors are values the caller keeps per sensor and feeds per
// reading or pane, each O(1) and allocation-free: StepDetector (CUSUM
// and EWMA of one-step prediction errors, OneStepError),
// FlatlineDetector, SpikeDetector, and the functions Silence and
// SpanCheck. PeerDeviations and Attribute judge a peer group.
//
// # Kinds
//
// Kind names what an alert is about. Slope, Curvature, Doubling and
// LeadTime are limits on the fits, judged by Evaluate; Step, Flatline,
// Spike, Silent and OutOfSpan come from detectors through Observe. Every
// property of a kind (name, report unit, whether it is judged on fits or
// per window, its evidence function, whether it opens tickets by default)
// is one row of the table in kinds.go. To add a kind: append its constant
// to the Kind list in enums.go (the numbers are stored, so never in
// between), add its row to kindTable, and, for a limit, its settings to
// Limits with their checks in Rule.resolve; for a detector, its settings
// to Detectors. Callers that list kinds use Kinds, Kind.String and
// ReportUnit and need no change; configs lists the names ticket_kinds
// accepts (configs.TicketKindNames).
//
// # Evidence before alarm
//
// A window is judged only when it holds MinReadings readings, MinCoverage
// of its panes have data, its trend fit is OK, positive definite, has a
// condition number at most MaxCond and finite numbers, and its standard
// errors can be trusted (seFor: the serial-correlation correction could
// be estimated, and the effective count of independent readings it
// implies is at least MinReadings); otherwise Decision.Judgement says why
// not (TooFewReadings, LowCoverage, IllConditioned, SerialUnknown,
// FewEffective, and PeersIncomplete from EvaluatePeers). Each limit
// level L is then breached when the bound of the 95% confidence interval
// nearest to "no change" lies beyond L, and the estimate lies beyond the
// significance floor q·SE, q from the alarm budget (see Budget):
//
//   - Slope (line c1) and Curvature (parabola c2): b = max(low, −high, 0);
//     breached when b > L and |c| > q·SE, q two-sided. Cleared when
//     |c| < f·L_low.
//   - Doubling (exp c1, growth only): breached when low > ln 2/L and
//     c1 > q·SE, q one-sided. Cleared when c1 < f·ln 2/L_low.
//   - LeadTime (trend model): breached when for some τ in [0, L] the
//     confidence bound of the trend's mean nearest the as-left value lies
//     outside the tolerance band, and the mean lies at least q standard
//     errors of the mean from the as-left value, q Scheffé's multiple.
//     Cleared when the fitted trend's own exit time is beyond L_low/f,
//     or not within the horizon.
//
// Here f is the ClearFraction and L_low the lowest level set (warning if
// set, else critical; for durations the longer time). For lead time the
// confidence band of the mean is used, not the prediction band of single
// readings (rolling.Crossing.Earliest): on pure noise a 1-day window's
// prediction band reaches a 3σ tolerance within days whatever the data,
// so its touch is no evidence. Earliest is still reported (event CI,
// ticket EarliestExit).
//
// # False alarms
//
// The Budget states how many alerts and tickets noise alone may raise per
// sensor-year (0.01 by default) and shares it, by Bonferroni's
// inequality, over the evaluations of a year, the kinds and the windows:
// α = B/(E·K·W) per (window, kind) evaluation. A raise consumes Debounce
// consecutive breaching evaluations that no other raise uses, so the gate
// may breach with probability Debounce·α, however correlated consecutive
// windows are; Budget documents the derivation and the quantiles.
// TestFalseAlarms_PureNoise measures it on 6,000 sensor-days of pure
// noise (200 sensors, 30 days of hourly N(0, 1) readings, windows 1d/1h
// and 30d/1d, every pane close): with a budget of 20 false alerts a
// sensor-year, to make rates measurable, the 1-day window raised 14
// slope, 3 curvature, 10 doubling and 5 lead-time alerts in 140,000
// evaluations each (1.0e-4, 2.1e-5, 7.1e-5, 3.6e-5) against α = 2.9e-4,
// and breached at 8.2e-4, 8.9e-4, 6.7e-4 and 2.6e-4 against the bound
// 8.6e-4 (the curvature attains it: its 1-day limit is far inside the
// noise); the 30-day window none. With the default budget nothing was
// raised. The cost is detection: a window detects only drift well beyond
// its own standard error, so short windows catch fast faults and long
// windows slow drift. TestDetection_TwiceTheSlopeLimit measures a drift
// of twice the slope warning level (0.1 kPa/d in N(0, 1) noise) raised on
// the 30-day window after 17 to 21 daily panes, median 19, as the
// least-squares slope of a hinge predicts.
//
// TestBudget_PlantNoise measures the default budget on plant noise with
// the pressure-transmitter class of configs/demo.yaml (tolerance
// 6.25 kPa, noise σ 1 kPa): white, AR(1) of φ 0.5, 0.9 and 0.98 read
// hourly and every 10 minutes, daily cycles of 1σ and 2σ, AR(1) 0.9
// with a cycle, 1,000 sensor-years each with -sim (the table is in the
// README). Every type stays within 0.01 false tickets and alerts a
// sensor-year, to the Poisson 99.9% bound of a count; the same gates on
// the plain least-squares SE open a ticket in every sensor-year of
// AR(1) 0.9 noise (9.4 alerts a sensor-year), which the normal run
// checks on 50 sensor-years. Two gates make autocorrelated noise hold:
// a window is judged with the serial estimate of the sensor's window
// with the most pairs when that is larger (Tracker.withSerial), and not
// at all when its effective count of independent readings is below
// MinReadings (FewEffective: AR(1) 0.98 hourly leaves a 30-day window
// about 7, and judged anyway it raised 0.069 tickets a sensor-year).
// TestDetection_PlantNoise measures drifts of 1 to 3 times the slope
// warning level against an oracle gate that knows the noise covariance
// (generalised least squares, the exact AR(1) covariance): the median
// delays are within 1.27 times the oracle's; where a drift is caught
// after it leaves tolerance, the oracle is as late (AR(1) 0.9 hourly,
// whose 30-day window holds about 38 independent readings).
//
// # Steps, stuck and silent sensors
//
// A step (a sudden shift of level: a knocked transmitter, a changed
// impulse line) looks to a sliding fit like a burst of drift. The
// StepDetector tells them apart on one-step-ahead prediction errors: a
// drift the fit follows leaves them centred, a step shifts all of them.
// Its CUSUM dates the change and sizes it; its decision interval comes
// from the budget (Tracker.StepSettings). FlatlineDetector reports a
// stuck value, SpikeDetector robust outliers (the caller keeps them out
// of the fits), Silence a sensor that stopped reporting and SpanCheck a
// reading beyond the calibrated range. None opens a ticket unless its
// kind is in Rule.TicketKinds.
//
// # Peer groups
//
// PeerDeviations gives each member its deviation from the median of all
// usable members, itself included: with three or more, a drifting member
// cannot move the reference of the healthy ones (the median of "the
// others", in Deviations, is the mean of two with three members, and half
// the drift leaks into the healthy members). The caller leaves stuck,
// silent or spiking members out of the reference. Attribute then names a
// member only when the others agree; two members that disagree are a
// pair disagreement, and neither is ticketed unless one has evidence of
// its own. TestPeers_Attribution checks groups of 2, 3 and 4 with a
// shared step and ramp.
//
// # States
//
// Each (window, kind) is Inactive, Pending (breaching, fewer than Debounce
// times in a row, or cooling down), Firing, or Resolved (cleared, in
// cooldown). An evaluation that is not judged is no evidence: it resets
// a pending run but never clears a firing alert. Severity rises
// (Escalated) after Debounce consecutive critical breaches and never
// steps down while firing. Detector kinds raise on the first active
// finding (the detectors confirm on their own) and clear on the first
// inactive one.
//
// # Tickets and calibration
//
// A raise of a kind in Rule.TicketKinds (default Slope and LeadTime)
// opens a ticket when none is open; its due date is the one-sided 95%
// lower confidence bound of the time the fitted mean leaves tolerance,
// minus TicketMargin, and later evaluations of its window revise it when
// it moves materially or falls overdue (see Ticket). Tracker.OpenTicket
// opens one for a caller that decides itself (a peer member after
// Attribute). Calibrate closes it, ends firing alerts with Reset events,
// forgets all alert state and takes the new as-left value; the caller
// restarts the sensor's fits from the calibration time, and Evaluate
// refuses older fits (ErrStale). Calibrate returns the Prior state it
// replaced; with it the caller can withdraw a mistaken calibration
// (Void: centre and calibration time back, the ticket it closed
// reopened) or replace its values (Correct). Both leave an Amendment on
// the ticket concerned.
//
// # Caveats
//
// The promises assume roughly normal noise around the model, its serial
// correlation described by the lag-1 autocorrelation (the AR(1)
// correction of seFor); the simulations measure white, AR(1) and
// daily-cycle noise, not every plant. Noise whose correlation time is
// long against a window leaves it too few effective readings to be
// judged (FewEffective), so such a sensor is watched by its longer
// windows only, or not at all. A drift that began inside a window is
// fitted with a lag (the line through a hinge is too flat), so a fast
// drift caught early can have a due date after its true exit as
// opened: in TestDetection_PlantNoise 3% of drifts of 3 times the slope
// warning level were due before the exit as opened, all of them once
// revised, a median of 127 days before the exit. Peer-group deviations
// remove what members share. Every event and ticket carries Caution.
package alert
