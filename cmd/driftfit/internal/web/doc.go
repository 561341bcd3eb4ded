// Package web serves the engineer's pages of driftfit serve: the fleet
// ranked by urgency, one sensor's fits for review (also as they stood at
// an earlier time), and the JSON and CSV behind them.
//
// # Routes
//
//	GET /                      the fleet; ?q=pattern&class=name&state=judged|not_judged|no_rule
//	GET /api/fleet             the same as JSON; the fleet page polls it
//	GET /sensors/{id}          one sensor; ?asof=RFC3339 for the page as it stood then
//	GET /sensors/{id}.csv      what the page shows, as CSV (or ?format=csv)
//	GET /sensors/{id}.json     the same as JSON (or ?format=json)
//	GET /api/sensors/{id}      the JSON of the sensor page; ?asof=
//
// A sensor id may contain dots; a trailing ".csv" or ".json" is read as
// the format unless ?format= is given, so a sensor named "x.json" is
// /sensors/x.json?format=html. Ids are validated (400 naming the
// problem); a valid id the store knows nothing of is 404.
//
// # What the numbers are
//
// Fits come from the store's fit history: for each window, the newest
// record at or before the time asked for. The band around the fitted
// model is the 95% confidence band of the fitted mean,
// ŷ(τ) ± t·√(xᵀ·Cov·x) with x = (1, τ, τ²) and t the fit's Student t
// (Draper and Smith, Applied Regression Analysis, 3rd ed., section 5.3),
// on the serially corrected covariance and effective degrees of freedom
// the gates use (a short window borrowing the estimate of the sensor's
// windows, as the service does), or the plain one where no correction
// could be estimated; for the exponential model it is taken on ln y and
// exponentiated.
// Alerts are the alert events up to that time replayed per window and
// kind. Calibrations are the sensor's calibration records as they stood
// at T (query.CalibrationsAt): recorded at or before T, and voided or
// corrected only if that was at or before T; a voided one is drawn
// struck, a corrected one not (its correction is), and neither centres
// the tolerance band. A sensor without records (a state file of an
// older build) has them read back from its tickets and events. A ticket
// is open at T when opened at or before T and not closed then: by a
// calibration done and, where records tell, recorded at or before T,
// and not withdrawn by a void at or before T. Whether a window is
// judged, and why not, is what the service says: its latest judgement (Options.Judgements)
// for "now", else the stored record judged by the alert package
// (alert.Judge) with the serial-correlation estimate of the sensor's
// windows at that time (alert.SerialOf).
//
// The pane means are those of the sensor's stored state
// (store.DB.LoadSensor, rolling.Sensor.AppendPanes): per pane the count
// and mean of its readings, and the residual, the mean minus the fitted
// model's mean over the same readings. Readings are kept for the current
// window only, so as of an earlier time the panes before it are gone;
// the page says so rather than draw them.
//
// # Concurrency
//
// The handler is safe for concurrent use. It keeps a cache of each
// sensor's first judged level (the as-left the alert rules take when the
// configuration gives none) and the fleet computed for "now", served
// again for 2 s so that several polling pages share one pass.
package web
