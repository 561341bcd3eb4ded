package configs

import (
	"time"
)

// Config is the decoded configuration of "driftfit serve". Parse and Load
// return it with defaults applied and validated; after that it is read-only
// and safe for concurrent use (ClassFor and Explain do not modify it).
//
// Zero values: a field that is zero and was not written in the file gets its
// documented default. A zero written explicitly in the file is kept (so
// "history_retention: 0" keeps history forever).
type Config struct {
	Bus      Bus
	Store    Store
	HTTP     HTTP
	Defaults Defaults
	// Classes in file order. A sensor id must match the patterns of at most
	// one class.
	Classes []Class
	// Sensors are per-sensor overrides in file order, keyed in the file by
	// exact sensor id.
	Sensors []Sensor
	// Groups are peer groups in file order.
	Groups []Group
	// Tickets configures delivery of recalibration tickets beyond the bus.
	Tickets Tickets

	file string
	// pos holds the position of every value written in the file, keyed by
	// field path ("classes[1].unit"). A path is present iff it was written.
	pos map[string]position
}

type position struct{ line, column int }

// Mode is how readings are taken from the bus.
type Mode int

// Delivery modes.
const (
	ModeUnknown Mode = iota
	// ModeStream consumes a JetStream stream with explicit acks: every
	// reading counts exactly once across restarts.
	ModeStream
	// ModeDirect subscribes with core NATS: lowest latency, at most once.
	ModeDirect
)

// String returns the name used in the file: "stream", "direct" or "unknown".
func (m Mode) String() string {
	switch m {
	case ModeStream:
		return "stream"
	case ModeDirect:
		return "direct"
	}
	return "unknown"
}

// Bus configures the NATS connection and subjects. Credentials are never
// held here: only the names of environment variables and paths of files that
// contain them.
type Bus struct {
	// Servers are NATS URLs (nats://, tls://, ws://, wss://). Empty means
	// start an embedded NATS server with JetStream under Store.Dir. A URL
	// may carry a user name but never a password.
	Servers []string
	// SubjectPrefix is the prefix of reading subjects, "<prefix>.<sensor id>".
	// Default "driftfit.in".
	SubjectPrefix string
	// RejectedSubject receives rejected readings with the reason in a
	// header. Default: SubjectPrefix with its last token replaced by
	// "rejected" ("driftfit.rejected"; "<prefix>_rejected" for a one-token
	// prefix). It must lie outside "<SubjectPrefix>.>", which the readings
	// stream captures.
	RejectedSubject string
	// AlertSubjectPrefix is the prefix of alert subjects,
	// "<prefix>.<sensor id>". Default "driftfit.alerts".
	AlertSubjectPrefix string
	// TicketSubject receives recalibration tickets. Default "driftfit.tickets".
	TicketSubject string
	// CalibrationSubjectPrefix is the prefix of calibration event subjects,
	// "<prefix>.<sensor id>". Default "driftfit.calibrations".
	CalibrationSubjectPrefix string
	// Mode is the delivery mode. Default ModeStream.
	Mode Mode
	// StreamName is the JetStream stream used in ModeStream. Default
	// "DRIFTFIT".
	StreamName string
	// MaxPayloadBytes bounds one message's payload; larger ones are
	// rejected. Default 1 MiB (1048576, the NATS server's default
	// max_payload, from memory); at most 64 MiB, the server's hard ceiling
	// (from memory).
	MaxPayloadBytes int
	// FutureSkew is how far ahead of the receiving clock a reading's time
	// may be. Default 5m. Zero (written explicitly) rejects any future time.
	FutureSkew time.Duration
	// StreamMaxBytes bounds the readings stream, in bytes; once full, the
	// server refuses new readings to their producers. Committed readings
	// are purged, so this is the backlog kept while serve is down.
	// Default 1 GiB (1073741824).
	StreamMaxBytes int
	// StreamMaxAge deletes readings older than this from the stream,
	// applied or not. Default 0: no age limit.
	StreamMaxAge time.Duration
	// RejectedMaxBytes bounds the dead-letter stream, in bytes, oldest
	// discarded first. Default 64 MiB (67108864).
	RejectedMaxBytes int
	// RejectedMaxAge bounds the dead-letter stream by age. Default 7d.
	RejectedMaxAge time.Duration
	// MaxSensors bounds the sensors held; readings of new ids beyond it
	// are refused (reason too_many_sensors). Default 200000.
	MaxSensors int
	// User is the NATS user name. Empty means no user/password auth.
	User string
	// PasswordEnv names the environment variable holding the password for
	// User. Empty means no password.
	PasswordEnv string
	// TokenEnv names the environment variable holding an auth token. Empty
	// means no token.
	TokenEnv string
	// CredsFile is the path of a NATS credentials (JWT + nkey seed) file.
	// Empty means none.
	CredsFile string
	// TLS configures TLS to the servers. All empty means the URL scheme
	// decides.
	TLS TLS
	// Embedded configures the embedded NATS server (Servers empty).
	Embedded Embedded
	// MQTT configures the embedded server's MQTT listener.
	MQTT MQTT
}

// Embedded configures the embedded NATS server.
type Embedded struct {
	// Host is the address the server listens on, with serve's --nats-port.
	// Default "127.0.0.1" (loopback). serve warns when it is anything
	// else and Users is empty.
	Host string
	// Users may connect, each with the permissions of its role; once
	// there is one, every client must authenticate. Empty (the default):
	// no authentication.
	Users []BusUser
}

// Roles of a BusUser.
const (
	RolePublisher  = "publisher"  // publishes readings of its sensors
	RoleTechnician = "technician" // sends calibrations of its sensors
	RoleReader     = "reader"     // asks the read API, hears alerts and tickets
)

// BusUser is a user of the embedded server.
type BusUser struct {
	// User is the name the client gives. Required; "driftfit-service"
	// is the service's own.
	User string
	// PasswordEnv names the environment variable holding the user's
	// password; serve refuses to start when it is empty. Required.
	PasswordEnv string
	// Role is publisher, technician or reader.
	Role string
	// Sensors are the sensor-id patterns of a publisher or technician,
	// with the NATS wildcards * (one token) and > (the rest): a
	// technician of unit 1 of Quillmere Vale has ["qm.u1.>"]. Required
	// for a technician; a publisher without it publishes any sensor's
	// readings; a reader has none (the read API serves every sensor).
	Sensors []string
}

// MQTT configures nats-server's MQTT listener on the embedded server:
// a reading published to the topic "<subject prefix, dots as
// slashes>/<sensor id, dots as slashes>" arrives as one on NATS.
type MQTT struct {
	// Listen is the host:port of the listener. Empty (the default): off.
	Listen string
}

// TLS holds paths of PEM files. CertFile and KeyFile come as a pair.
type TLS struct {
	CAFile   string
	CertFile string
	KeyFile  string
}

// Store configures the bbolt database.
type Store struct {
	// Dir is the data directory. Default "./data".
	Dir string
	// CommitInterval is the longest time between commits. Default 1s.
	CommitInterval time.Duration
	// CommitReadings commits early after this many applied readings.
	// Default 1000000.
	CommitReadings int
	// CommitMaxSensors bounds the sensors one commit writes, besides those
	// with an alert decision or calibration waiting, so decisions are not
	// held up by a commit of the whole fleet. Default 10000.
	CommitMaxSensors int
	// HistoryRetention is how long fit history is kept. Default 400d
	// (more than a year, so a yearly calibration cycle can be compared with
	// the one before). Zero written in the file keeps history forever.
	HistoryRetention time.Duration
	// HistoryThinAfter is the age after which the fit history of windows
	// whose pane is shorter than HistoryThinTo keeps one record per
	// HistoryThinTo (the last of each). Default 30d; zero written in the
	// file keeps every record.
	HistoryThinAfter time.Duration
	// HistoryThinTo is the interval thinned history keeps one record of.
	// Default 1d.
	HistoryThinTo time.Duration
}

// HTTP configures the listener of /metrics and the engineer's pages.
type HTTP struct {
	// Addr is the listen address of /metrics and the pages. Default
	// "127.0.0.1:9464" (loopback, so nothing is exposed unless asked for).
	Addr string
	// TokenEnv names the environment variable holding the bearer token
	// the pages and their JSON ask for. Empty (the default): no token, for
	// a loopback listener. configs never reads the variable; serve does.
	TokenEnv string
}

// Tickets configures where recalibration tickets go besides
// Bus.TicketSubject, which always receives them.
type Tickets struct {
	Webhook Webhook
}

// Webhook configures an HTTP endpoint that receives every recalibration
// ticket as a JSON POST. Tickets wait in the store's outbox until the
// endpoint accepts them, so a receiver that is down loses none.
//
// The Authorization header value is a credential: the file only names the
// environment variable that holds it (HeaderEnv), and configs never reads
// that variable.
type Webhook struct {
	// URL is the http:// or https:// address tickets are posted to. Empty
	// means no webhook: tickets are only published on the bus. A URL may
	// carry a user name but never a password; its query string is masked
	// by Explain and in error messages, since receivers often take a token
	// there.
	URL string
	// Timeout bounds one delivery attempt, from connecting to reading the
	// response status; a slower attempt counts as failed and is retried.
	// Default 10s; must be > 0.
	Timeout time.Duration
	// MaxBackoff caps the wait between retries of a failed delivery, which
	// grows with each failure until it reaches this cap. Default 5m; must
	// be > 0.
	MaxBackoff time.Duration
	// HeaderEnv names the environment variable whose value is sent as the
	// Authorization header ("Bearer ...", "Basic ..."). Empty means no
	// Authorization header.
	HeaderEnv string
}

// Defaults hold values that classes inherit when they do not set them.
type Defaults struct {
	// Windows default to {1d, 1h} and {30d, 1d}.
	Windows []Window
}

// Window is a sliding window of Span made of panes of width Pane, aligned to
// the Unix epoch. Span is a whole multiple of Pane.
type Window struct {
	Span time.Duration
	Pane time.Duration
}

// maxPanes bounds Span/Pane. Each pane keeps its sums in about 128 bytes, so
// 100000 panes is 12.8 MB for one window of one sensor, which is certainly a
// typing mistake (a "1s" pane on a "400d" span) rather than a plan.
const maxPanes = 100000

// Span is a calibrated range in engineering units, Lower < Upper.
type Span struct {
	Lower float64
	Upper float64
}

// Width returns Upper - Lower, the base of "%span" quantities.
func (s Span) Width() float64 { return s.Upper - s.Lower }

// TrendModel is the fit used to predict when a sensor leaves tolerance.
type TrendModel int

// Trend models.
const (
	TrendUnknown TrendModel = iota
	// TrendLine extrapolates the fitted straight line.
	TrendLine
	// TrendParabola extrapolates the fitted parabola (accelerating drift).
	TrendParabola
)

// String returns the name used in the file: "line", "parabola" or "unknown".
func (m TrendModel) String() string {
	switch m {
	case TrendLine:
		return "line"
	case TrendParabola:
		return "parabola"
	}
	return "unknown"
}

// Class describes a kind of sensor: its unit, range, tolerance, windows and
// limits. The canonical values (Tolerance.Abs, Threshold.Value) are filled
// by Validate and recomputed by ClassFor when a sensor overrides the span or
// unit.
type Class struct {
	// Name identifies the class; unique, required.
	Name string
	// Match lists sensor id patterns ("*" and "?" within one dot-separated
	// token). A class with no patterns only covers sensors pinned to it.
	Match []string
	// Unit is the engineering unit of readings ("kPa", "degC", "mm/s",
	// "%LEL"); required. Units are compared as exact strings.
	Unit string
	// Span is the calibrated range; required, Lower < Upper.
	Span Span
	// Tolerance is the permitted deviation from the as-left value; required.
	Tolerance Tolerance
	// Windows of the fits. Empty means Defaults.Windows.
	Windows []Window
	// TrendModel predicts the time to leave tolerance. Default TrendLine.
	TrendModel TrendModel
	// MinReadings is the least number of readings in a window before its
	// limits are evaluated. Default 30 (the usual rule-of-thumb sample size
	// for normal-theory intervals, common practice); must exceed the number
	// of fitted coefficients (2 for a line, 3 for a parabola).
	MinReadings int
	// MinCoverage is the least fraction of a window's panes holding data
	// before its limits are evaluated, 0..1. Default 0.5 (our choice).
	// Zero written in the file evaluates windows however sparse.
	MinCoverage float64
	// Debounce is how many consecutive pane closes a breach must persist
	// before the alert fires, >= 1. Default 3 (our choice).
	Debounce int
	// ClearFraction is the hysteresis: a firing alert clears only once the
	// evidence is below ClearFraction times the limit, 0 < f < 1. Default
	// 0.8.
	ClearFraction float64
	// Cooldown is the least time between two firings of the same alert.
	// Default 24h. Zero written in the file means no cooldown.
	Cooldown time.Duration
	// Limits that raise alerts; each is optional.
	Limits Limits
	// AlarmBudget is how many alerts and tickets noise alone may raise
	// per sensor-year; the evidence gates of every limit and window
	// share it (alert.Budget).
	AlarmBudget AlarmBudget
	// Detectors configure the step and data-quality detectors; each is
	// off unless written.
	Detectors Detectors
	// TicketKinds lists the alert kinds whose raise opens a
	// recalibration ticket, by name (see TicketKindNames). Not written:
	// slope and lead_time; an empty list written opens none.
	TicketKinds []string
	// HasTicketKinds says ticket_kinds was written.
	HasTicketKinds bool

	// SensorID, AsLeft, HasAsLeft and Group are set only on the copy that
	// ClassFor returns.
	SensorID string
	// AsLeft is the sensor's value after its last calibration, in Unit.
	AsLeft    float64
	HasAsLeft bool
	// Group is the sensor's peer group, empty if none.
	Group string
}

// AlarmBudget is the false-alarm budget of a class.
type AlarmBudget struct {
	// FalseTicketsPerYear is the accepted rate of tickets opened by
	// noise alone, per sensor-year, > 0. Default 0.01 (our choice);
	// zero in a Config built in code means the default.
	FalseTicketsPerYear float64
	// AlertsPerYear is the accepted rate of alerts raised by noise
	// alone, per sensor-year, > 0. Default FalseTicketsPerYear; zero in
	// a Config built in code means that.
	AlertsPerYear float64
}

// Detectors are the step and data-quality detectors of a class. A zero
// field of a detector that is on takes the alert package's default.
type Detectors struct {
	// Step tells a step from drift (CUSUM of one-step prediction
	// errors); on when detectors.step is written.
	Step StepDetector
	// Flatline reports a stuck value; on when For > 0.
	Flatline Flatline
	// Spike reports robust outliers, kept out of the fits; on when K > 0.
	Spike Spike
	// Silent is how long without a reading makes a sensor silent; 0 off.
	Silent time.Duration
	// OutOfSpan reports readings beyond the calibrated span.
	OutOfSpan bool
}

// StepDetector configures the step detector.
type StepDetector struct {
	On bool
	// K is the CUSUM reference value in standard deviations, >= 0;
	// 0: 0.5. H is the decision interval, >= 0; 0: from the alarm
	// budget.
	K, H float64
	// Rebaseline restarts the sensor's fits from the change time of a
	// confirmed step (keeping the as-left), so the step does not show as
	// a slope. Default false.
	Rebaseline bool
}

// Flatline configures the stuck-value detector.
type Flatline struct {
	// For is how long the readings must stay within Resolution; >= 0.
	For time.Duration
	// MinCount is the least number of readings in the run; 0: 10, else
	// >= 2.
	MinCount int
	// Resolution is the largest spread of a stuck run, in the class
	// unit, >= 0; 0: exactly equal values.
	Resolution float64
}

// Spike configures the spike detector.
type Spike struct {
	// K is the threshold in robust standard deviations: 0 off, else >= 3.
	K float64
	// Count spikes within Within raise the alert; 0: 3 within 1h.
	Count  int
	Within time.Duration
}

// TicketKindNames are the alert kind names ticket_kinds accepts, as the
// alert package names them.
var TicketKindNames = []string{"slope", "curvature", "doubling", "lead_time", "step", "flatline", "spike", "silent", "out_of_span"}

// Tolerance is the permitted deviation from the as-left value.
type Tolerance struct {
	// Text is the value as written: "0.5 kPa" or "0.25 %span".
	Text string
	// Abs is the tolerance in the class unit, > 0; filled by Validate.
	Abs float64
}

// Limits are the alert limits of a class. A limit whose two levels are
// both unset is off. Rate limits apply to the magnitude of the fitted
// coefficient, so they are written as positive numbers.
type Limits struct {
	// Slope limits the line's drift rate; canonical unit: Unit per day.
	Slope RateLimit
	// Curvature limits the parabola's curvature coefficient; canonical
	// unit: Unit per day².
	Curvature RateLimit
	// DoublingTime limits exponential growth (the exp fit): an alert when
	// the value doubles faster than this. Shorter is worse, so the warning
	// level is the longer time.
	DoublingTime DurationLimit
	// LeadTime alerts when the trend model predicts the value leaves the
	// tolerance band around the as-left value within this time. Shorter is
	// worse, so the warning level is the longer time.
	LeadTime DurationLimit
}

// RateLimit holds the two severities of a slope or curvature limit.
// A single value in the file sets Critical only.
type RateLimit struct {
	Warning  Threshold
	Critical Threshold
}

// On reports whether either level is set.
func (l RateLimit) On() bool { return l.Warning.Text != "" || l.Critical.Text != "" }

// Threshold is one level of a rate limit.
type Threshold struct {
	// Text is the level as written ("0.05 %span/month"); empty means unset.
	Text string
	// Value is the level in canonical units (class unit per day, or per
	// day² for curvature), > 0; filled by Validate.
	Value float64
}

// DurationLimit holds the two severities of a time limit. Zero means the
// level is unset.
type DurationLimit struct {
	Warning  time.Duration
	Critical time.Duration
}

// On reports whether either level is set.
func (l DurationLimit) On() bool { return l.Warning != 0 || l.Critical != 0 }

// Sensor holds the settings of one sensor, keyed in the file by its exact
// id. Class fields written under the sensor override the class's.
type Sensor struct {
	// ID is the exact sensor id.
	ID string
	// Class pins the sensor to the named class regardless of patterns.
	// Empty means the class is found by pattern.
	Class string
	// AsLeft is the value after the last calibration, valid if HasAsLeft.
	AsLeft    float64
	HasAsLeft bool
	// Group names the peer group the sensor belongs to, in addition to
	// groups that list it by pattern. Empty means none.
	Group string

	// over holds the overriding class fields; which ones were written is
	// recorded in Config.pos under "sensors[<id>].<field>".
	over Class
}

// Group is a peer group: sensors measuring the same quantity, so a change
// common to all of them is a process change, not drift.
type Group struct {
	// Name identifies the group; unique, required.
	Name string
	// Members are sensor ids or patterns. Sensors can also join through
	// their own "group" field.
	Members []string
}
