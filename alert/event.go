package alert

import (
	"fmt"
	"time"

	"driftfit/rolling"
)

// Caution is carried by every event and ticket.
const Caution = "driftfit is an aid to maintenance planning: it supports, and never replaces, " +
	"safety instrumented functions, site procedures and licensed practice. " +
	"Check the instrument before acting, and keep it on its proof-test and calibration schedule whatever this says."

// Event is a change of an alert: raised, escalated, cleared or reset.
// Its JSON encoding (snake_case keys, enums and model as names, times in
// RFC 3339 UTC) is the wire format on NATS and for webhooks.
//
// Value, CI and Limit are in the report unit of Kind (Unit):
//   - Slope: c1 of the line fit, Unit/d.
//   - Curvature: c2 of the parabola fit, Unit/d².
//   - Doubling: c1 of the exp fit, the growth rate in 1/d; the doubling
//     time is ln 2 / Value and the limit ln 2 / (level in days).
//   - LeadTime: days from the fit's newest reading until the fitted trend
//     leaves the tolerance band (0: already out); CI is the 95%
//     confidence interval of that time from the confidence band of the
//     mean the gate judges (serially corrected): from when the band's
//     near edge reaches the tolerance edge to when the whole band is out,
//     CI[1] being the bound the gate compared with Limit (a breach also
//     needs the mean to clear the significance floor, see doc.go). When
//     the trend stays inside within the horizon, Value (and any CI end
//     not reached) is the horizon and BeyondHorizon is true.
//   - Step: the estimated step size in Unit; Limit the CUSUM's decision
//     interval in standard deviations.
//   - Flatline and Silent: days stuck or silent; Limit the configured
//     time in days.
//   - Spike: the largest |error|/σ̂ of the run; Limit the threshold K.
//   - OutOfSpan: the reading in Unit; Limit the span bound it passed.
//
// For detector kinds (Tracker.Observe) First is when the condition began
// (for Step the estimated change time), Last the observation time, CI
// zero and Model empty; kinds kept once per sensor have an empty Window.
//
// Severity is the alert's severity when the event happened: for Cleared
// and Reset, the severity it had while firing. Limit is the level of
// Severity for Raised and Escalated; for Cleared,
// the lowest level of the limit, whose ClearFraction the clear statistic
// fell below. A Reset event carries no fit: Value, CI, N are zero and
// First, Last, Model empty.
type Event struct {
	Type          EventType  `json:"type"`
	Sensor        string     `json:"sensor"`
	Class         string     `json:"class,omitempty"`
	Window        string     `json:"window"`
	Model         string     `json:"model,omitempty"`
	Kind          Kind       `json:"kind"`
	Severity      Severity   `json:"severity"`
	State         State      `json:"state"`
	At            time.Time  `json:"at"`
	Value         float64    `json:"value"`
	CI            [2]float64 `json:"ci95"`
	Limit         float64    `json:"limit"`
	Unit          string     `json:"unit"`
	BeyondHorizon bool       `json:"beyond_horizon,omitempty"`
	N             int        `json:"n"`
	First         time.Time  `json:"first,omitzero"`
	Last          time.Time  `json:"last,omitzero"`
	Caution       string     `json:"caution"`
}

// WindowName formats a window as "span/pane", each in the largest whole
// unit of d, h, m or s that fits ("30d/1d", "1d/1h", "90m/15m").
func WindowName(w rolling.WindowSpec) string { return durName(w.Span) + "/" + durName(w.Pane) }

// windowLabel is WindowName, or "" for the zero window of the alerts
// kept once per sensor.
func windowLabel(w rolling.WindowSpec) string {
	if w == (rolling.WindowSpec{}) {
		return ""
	}
	return WindowName(w)
}

func durName(d time.Duration) string {
	switch {
	case d > 0 && d%day == 0:
		return fmt.Sprintf("%dd", d/day)
	case d > 0 && d%time.Hour == 0:
		return fmt.Sprintf("%dh", d/time.Hour)
	case d > 0 && d%time.Minute == 0:
		return fmt.Sprintf("%dm", d/time.Minute)
	case d > 0 && d%time.Second == 0:
		return fmt.Sprintf("%ds", d/time.Second)
	}
	return d.String()
}

// utc returns t as a UTC time without monotonic reading, the form every
// time held by this package takes, so that states compare and round-trip
// exactly. The zero time stays zero.
func utc(t time.Time) time.Time {
	if t.IsZero() {
		return time.Time{}
	}
	return time.Unix(0, t.UnixNano()).UTC()
}

// Times outside these bounds do not fit int64 nanoseconds.
var (
	minTime = time.Unix(0, -1<<63+1).UTC()
	maxTime = time.Unix(0, 1<<63-1).UTC()
)

func timeOK(t time.Time) bool { return !t.IsZero() && !t.Before(minTime) && !t.After(maxTime) }
