// Package alert decides when a sensor's fitted drift deserves an alert or a
// recalibration ticket. It is pure: no I/O, no clock, no goroutines, no
// logging. The caller passes in each window's rolling.Solution with the
// time of evaluation, and delivers and stores what comes back.
//
// # Main types
//
// A Rule holds one sensor's settings (tolerance, windows, gates, debounce,
// hysteresis, cooldown, limits). A Tracker holds one sensor's state: a
// state machine per (window, kind), the as-left value, the last
// calibration and the open Ticket. Tracker.Evaluate returns Events
// (raised, escalated, cleared) and any ticket it opened;
// Tracker.Calibrate closes the ticket and resets the sensor. Event and
// Ticket marshal to JSON with snake_case keys: the wire format. The
// Tracker's state marshals to a canonical binary form for storage.
// Deviations turns a peer group's bucketed values into each member's
// deviation from its peers.
//
// # Evidence before alarm
//
// A solution is judged only when its window holds MinReadings readings
// and MinCoverage of its panes have data, and a fit only when it is OK,
// positive definite, has MinReadings readings and a condition number at
// most MaxCond. Each limit level L is then breached when the bound of the
// 95% confidence interval nearest to "no change" lies beyond L, and also
// beyond the interval's own half-width (the significance floor):
//
//   - Slope (line c1) and Curvature (parabola c2): b = max(low, −high, 0);
//     breached when b > L and b > t·SE. Cleared when |c| < f·L_low.
//   - Doubling (exp c1, growth only): breached when low > ln 2/L and
//     low > t·SE. Cleared when c1 < f·ln 2/L_low.
//   - LeadTime (trend model): breached when for some τ in [0, L] the
//     confidence bound of the trend's mean nearest the as-left value lies
//     outside the tolerance band, and at least its half-width from the
//     as-left value. Cleared when the fitted trend's own exit time is
//     beyond L_low/f, or not within the horizon.
//
// Here t is the fit's Student t (97.5%), f the ClearFraction and L_low the
// lowest level set (warning if set, else critical; for durations the
// longer time). For lead time the confidence band of the mean is used,
// not the prediction band of single readings (rolling.Crossing.Earliest):
// on pure noise a 1-day window's prediction band reaches a 3σ tolerance
// within days whatever the data, so its touch is no evidence. Earliest is
// still reported (event CI, ticket EarliestExit).
//
// # False alarms
//
// The floor makes a breach under no drift need an estimate at least 2t
// standard errors from zero, whatever the limit and however short the
// window. Per evaluation the breach probability is then at most
// P(|T_df| > 2t) for slope and curvature, P(T_df > 2t) for doubling, and
// for lead time P(F(p, df) > (2t)²/p), Scheffé's bound holding for every
// τ at once (p the trend's coefficients). With MinReadings 20 and a line
// (df 18) these are 5.4e-4, 2.7e-4 and 2.1e-3. Each raise consumes
// Debounce consecutive breaching evaluations that no other raise uses, so
// raises per evaluation are at most that bound divided by Debounce, even
// though consecutive fits of a sliding window are strongly correlated.
// TestFalseAlarms_PureNoise measures it on 12,000 sensor-days (400
// sensors, 30 days of hourly N(0, 1) readings, windows 1d/1h and 30d/1d,
// every pane close): on the 1-day window 12 slope, 6 curvature, 9
// doubling and 14 lead-time raises in 280,000 evaluations each, that is
// 4.3e-5, 2.1e-5, 3.2e-5 and 5.0e-5 per evaluation against promises of
// 1.8e-4, 1.9e-4, 8.9e-5 and 7.1e-4; none on the 30-day window (6,000
// evaluations). The cost is detection: a window detects only drift
// at least 2t standard errors of its own estimate, so short windows catch
// fast faults and long windows slow drift. TestDetection_TwiceTheSlopeLimit
// measures a drift of twice the slope warning level (0.1 kPa/d in N(0, 1)
// noise) raised on the 30-day window after 17 to 21 daily panes, median
// 19, as the least-squares slope of a hinge predicts.
//
// # States
//
// Each (window, kind) is Inactive, Pending (breaching, fewer than Debounce
// times in a row, or cooling down), Firing, or Resolved (cleared, in
// cooldown). An evaluation that fails a gate is no evidence: it resets a
// pending run but never clears a firing alert. Severity rises (Escalated)
// after Debounce consecutive critical breaches and never steps down while
// firing.
//
// # Tickets and calibration
//
// A Slope or LeadTime raise opens a ticket when none is open; its due date
// is the predicted exit from tolerance minus TicketMargin (see Ticket).
// Calibrate closes it, ends firing alerts with Reset events, forgets all
// alert state and takes the new as-left value; the caller restarts the
// sensor's fits from the calibration time, and Evaluate refuses older fits
// (ErrStale).
//
// # Caveats
//
// The promises assume independent, roughly normal noise around the
// model. Autocorrelated noise (a slow process cycle) narrows the fitted
// intervals below the truth and raises the false-alarm rate; peer-group
// deviations remove what members share. Every event and ticket carries
// Caution.
package alert
