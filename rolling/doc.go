// Package rolling keeps least-squares fits of one sensor's readings over
// sliding time windows, updated in O(1) per reading. It is pure
// computation: no I/O, no clock, no goroutines.
//
// # Windows and panes
//
// A window has a span S and a pane width w, S a whole multiple of w. Panes
// are aligned to the Unix epoch: pane k holds the readings with
// k·w ≤ t < (k+1)·w. The window holds the S/w most recent panes, ending
// with the pane of the newest reading seen. Readings may arrive out of
// order; one whose pane is already older than a window is not part of it
// (counted by Sensor.Late), and Sensor.Add refuses it with ErrTooOld when no
// window takes it. Windows of one sensor with the same pane width share one
// ring of panes.
//
// Each pane keeps the sufficient statistics of its readings (160 bytes), so
// a window slides by dropping whole panes: no raw readings are kept, and no
// error accumulates, since nothing is ever subtracted from a running sum.
// Sensor.AppendPanes turns a window's panes back into counts, mean values
// and mean times, for a picture of the readings behind a fit.
//
// # Models
//
// Sensor.Solve fits three models on τ = (t − t_newest) in days, t_newest
// being the newest reading of the window:
//
//   - Line: y ≈ c0 + c1·τ. c0 is the level now, c1 the drift rate per day.
//   - Parabola: y ≈ c0 + c1·τ + c2·τ². c1 is the slope now (per day), c2 the
//     curvature per day² (the slope changes by 2·c2 per day).
//   - Exp: ln y ≈ c0 + c1·τ over the readings with y > 0. c1 is the growth
//     rate per day, ln 2/c1 the doubling time in days (halving if c1 < 0).
//
// Each Fit reports the coefficients with standard errors and 95% confidence
// intervals (Student's t with n − p degrees of freedom), the residual
// standard deviation, R², the condition number of the scaled normal matrix
// and whether it is positive definite. Fit.Predict gives a value with its
// 95% prediction interval; Fit.TimeToLimit the time until a trend reaches a
// limit, with the interval from the prediction band (when a single
// reading may be found beyond it); Fit.MeanTimeToLimit the time until the
// fitted mean reaches it, with Fieller's interval and a one-sided lower
// confidence bound (a due date).
//
// To add a model: a Model constant and its name and coefficient count in
// model.go (Models lists them in report order), its normal equations from
// the pane sums in the solve of fit.go (a model on a transform of y, like
// Exp, needs its sums kept per pane in pane.go and encoded in state.go,
// with a format version), a Fit field in Solution, and a reference check
// in fit_test.go against gonum's batch least squares.
//
// # Serial correlation
//
// Plant noise is autocorrelated, and the standard errors above assume it
// is not. Each fit also reports the lag-1 autocorrelation R1 of its
// residuals, over consecutive readings in time order (each pane keeps the
// sums of its consecutive differences and its last value, so neighbouring
// panes are bridged), and standard errors and intervals corrected for it
// with the effective sample size of Santer et al. (2000): SEAdj, CIAdj.
// SerialErr says when that is not possible: fewer than MinPairs pairs, or
// readings that arrived out of order in too many panes (such a pane
// contributes no pair). A short window should borrow the estimate of a
// long window of the same sensor: Solution.WithSerial.
//
// # Precision
//
// Unix times in seconds, squared and raised to the fourth power, leave no
// significant digit in float64 sums. Here a pane stores time as the
// position u ∈ [0, 1) after its earliest reading, in pane widths, and
// values relative to its first value; solving shifts those sums exactly
// onto a time scaled to [−1, 1] across the window's readings, and computes
// the residual sum of squares pane by pane from the pane's own sums,
// never as a difference of two window totals. Readings bunched into part
// of a wide pane, 1-ns steps, or thousands of readings at one instant keep
// 10 or more significant digits against exact rational least squares
// (exact_test.go). A residual sum below its rounding bound is reported as
// ErrUnresolved, with upper-bound standard errors, not as zero. Sensor.Add
// refuses values beyond ±MaxValue (ErrOutOfRange), so that no pane sum
// can overflow; values so close together that their squared differences
// are subnormal (near 1e-154) give ErrNumeric. Fits feeding the NIST StRD Norris and Pontius data one
// reading at a time reproduce the certified values to 12 or more
// significant digits, with or without a 2026 epoch offset, when the data
// spread over several panes; see nist_test.go for the one-pane limit.
package rolling
