package ingest

import (
	"errors"
	"fmt"
	"runtime"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/rolling"
	"driftfit/store"
)

// Mode says how readings come off the bus.
type Mode uint8

const (
	// ModeUnknown is the zero Mode; Options treat it as ModeStream.
	ModeUnknown Mode = iota
	// ModeStream consumes a JetStream stream with a durable pull consumer:
	// every reading counts exactly once across crashes and restarts.
	ModeStream
	// ModeDirect subscribes with core NATS: lowest latency, at most once.
	ModeDirect
)

func (m Mode) String() string {
	switch m {
	case ModeStream:
		return "stream"
	case ModeDirect:
		return "direct"
	}
	return "unknown"
}

// SensorConfig is what the service needs to know of one sensor.
type SensorConfig struct {
	Windows []rolling.WindowSpec
	// Unit is the sensor's engineering unit; readings that carry another
	// unit are rejected. Empty: any unit is accepted.
	Unit string
	// Group names the sensor's peer group; empty: none. All members of a
	// group are routed to one worker, which compares them.
	Group string
	// StepRebaseline restarts the sensor's fits from the change time of
	// each step its step detector confirms (alert.Detectors.Step), as a
	// calibration restarts them but keeping the as-left value, so that
	// the windows do not read the step as drift. The readings between
	// the change and its confirmation are not refitted. False: the
	// windows keep the step until it slides out.
	StepRebaseline bool
}

// Options configure a Service. Zero fields take the documented defaults.
type Options struct {
	// Conn is the NATS connection. Required.
	Conn *nats.Conn
	// DB holds the sensors' state, the fit history and the stream
	// position. Required.
	DB *store.DB
	// Sensor returns the configuration of a sensor id, or an error for an
	// id that has none (its readings are then rejected). Required. The
	// restore calls it from several goroutines at once: it must be safe
	// for concurrent use.
	Sensor func(id string) (SensorConfig, error)

	// Mode defaults to ModeStream.
	Mode Mode
	// SubjectPrefix: readings arrive on <SubjectPrefix>.<sensor id>.
	// Default "driftfit.in".
	SubjectPrefix string
	// RejectedSubject receives refused input with the reason in headers.
	// Default DefaultRejectedSubject(SubjectPrefix), "driftfit.rejected"
	// for the default prefix. It must not lie under
	// <SubjectPrefix>.>: the readings stream captures all of that, and
	// dead letters have a stream of their own (RejectedStream).
	RejectedSubject string
	// StreamName is the JetStream stream holding readings (ModeStream).
	// Default "DRIFTFIT". It is created, capturing <SubjectPrefix>.>, if
	// it does not exist. New readings are refused to their producers once
	// it holds StreamMaxBytes (discard-new), so no reading leaves it
	// unapplied; what a commit holds is purged from it.
	StreamName string
	// StreamMaxBytes bounds the readings stream, in bytes. Default
	// DefaultStreamMaxBytes (1 GiB). Since committed readings are purged,
	// the stream holds what serve has not yet committed: the limit is
	// the backlog kept while serve is down.
	StreamMaxBytes int64
	// StreamMaxAge makes the server delete readings older than this from
	// the stream, applied or not (a gap serve reports). Zero (the
	// default): no age limit, only StreamMaxBytes.
	StreamMaxAge time.Duration
	// RejectedStream is the stream that keeps dead letters (ModeStream),
	// capturing RejectedSubject, oldest discarded first. Default
	// <StreamName>_REJECTED.
	RejectedStream string
	// RejectedMaxBytes bounds RejectedStream, in bytes. Default
	// DefaultRejectedMaxBytes (64 MiB).
	RejectedMaxBytes int64
	// RejectedMaxAge bounds RejectedStream by age. Default 7 days.
	RejectedMaxAge time.Duration
	// ResetPosition starts from the beginning of the readings stream when
	// the stream is not the one the DB's position was taken in (it was
	// deleted, rebuilt or renamed); without it, Run refuses to start then
	// (ErrStreamChanged). ModeStream only.
	ResetPosition bool
	// MaxSensors bounds the sensors held (with routes of new ids whose
	// readings are still in flight): readings of a new id beyond it are
	// refused as too_many_sensors. Each sensor costs about 8 KiB with the
	// default windows. Default DefaultMaxSensors (200,000).
	MaxSensors int
	// Durable names the pull consumer (ModeStream). Default "driftfit".
	Durable string
	// Workers is the count of goroutines that own the sensors, each a
	// share by hash of the id. Default runtime.GOMAXPROCS(0).
	Workers int
	// CommitInterval is the longest time between two commits to the DB:
	// in direct mode, what a crash can lose beyond the messages in flight;
	// in stream mode, what a restart reads again. A commit rewrites the
	// open panes of every sensor that changed, so commits much more often
	// than the sensors report cost CPU for nothing. Default 1s.
	CommitInterval time.Duration
	// CommitReadings starts a commit early once this many readings were
	// applied since the last one: it bounds the work a restart repeats
	// when readings come faster than a million a second. Each commit
	// ends with fsync; in stream mode with 100 readings a message, a
	// commit every 100,000 readings cost a third of the throughput in
	// one measurement (none in a later one, the disk busier).
	// Default 1,000,000. While the previous commit is still writing,
	// readings keep being applied and go into the next commit, so a slow
	// disk makes commits larger rather than stalling ingest.
	CommitReadings int
	// CommitMaxSensors bounds the sensors one commit writes, besides those
	// with an alert decision or a calibration waiting, which are always
	// written at once: a commit's time grows with the sensors it writes
	// (about 16 µs a sensor with fsync, store's BenchmarkCommit), and a
	// decision must not wait seconds behind a commit of the whole fleet.
	// The others wait for the next commit, oldest change first; each
	// sensor stores the stream sequence its state holds, so a restart
	// from the older position skips what it already has. The last commit
	// at shutdown writes everything. Default 10,000 (about 0.16 s with
	// fsync on a 2-core VM): at 5,000 a fleet of 10,000 committed in two
	// parts, each with its own fsync and stream sequences to store, and
	// the bench's stream applied 7.4 M readings/s against 8.0 M at 20,000
	// (three runs each); at 20,000 the p99 from pane close to alert at
	// 100,000 sensors under load was 0.35 and 0.77 s in two runs.
	CommitMaxSensors int
	// FutureSkew is how far a reading's time may lie ahead of Now.
	// Default 5m.
	FutureSkew time.Duration
	// MaxPayload is the largest payload accepted, in bytes. Default
	// DefaultMaxBytes.
	MaxPayload int
	// HistoryRetention deletes fit history older than this, a little at
	// a time between commits. Zero keeps history forever.
	HistoryRetention time.Duration
	// HistoryThinAfter and HistoryThinTo thin the fit history older than
	// HistoryThinAfter to one record per HistoryThinTo for windows whose
	// pane is shorter (store.DB.ThinHistory), a little at a time between
	// commits. Zero HistoryThinAfter keeps every record.
	HistoryThinAfter, HistoryThinTo time.Duration
	// Rule returns the alert rule of a sensor, ok false when it has none.
	// Nil: no sensor is judged. It is called by the workers, concurrently:
	// it must be safe for concurrent use.
	Rule func(id string) (r alert.Rule, ok bool)
	// AlertSubjectPrefix: alert events go out on <AlertSubjectPrefix>.<sensor
	// id>. Default "driftfit.alerts".
	AlertSubjectPrefix string
	// TicketSubject receives recalibration tickets (opening and closing).
	// Default "driftfit.tickets".
	TicketSubject string
	// CalibrationSubjectPrefix: calibrations arrive on
	// <CalibrationSubjectPrefix>.<sensor id> (see CalibrationMsg).
	// Default "driftfit.calibrations".
	CalibrationSubjectPrefix string
	// Webhook, if its URL is set, also receives every ticket revision.
	Webhook Webhook
	// StopTimeout bounds each wait of the shutdown: for the bus
	// subscription to stop delivering, and for the alert events and
	// tickets of the last commit to be published (what is not published
	// by then is sent at the next start). Default 5s.
	StopTimeout time.Duration

	// AcceptDuplicates turns the duplicate check (Dedup) off: every
	// reading the windows take is applied, repeats included. For
	// benchmarks that send one pool of readings over and over; a
	// deployment leaves it false (the default), so a producer's re-sent
	// readings do not count twice.
	AcceptDuplicates bool
	// CheckInterval is how often the stream's fill is read (ModeStream),
	// for the StreamBytes metric and the warning when it nears its limit.
	// Default 10s.
	CheckInterval time.Duration
	// PurgeInterval is the longest a committed stream message waits to
	// be purged (ModeStream), unless the committed messages not yet
	// purged reach an eighth of StreamMaxBytes first. Each purge makes
	// the server rewrite part of a stream block, so purging after every
	// commit (several a second under load) cost 5% of the stream's
	// throughput. Default 5s.
	PurgeInterval time.Duration
	// Now returns the current time. Default time.Now.
	Now func() time.Time
	// Logger receives the service's events. Default: a disabled logger.
	Logger *zerolog.Logger
	// Metrics, if not nil, is updated as the service runs.
	Metrics *Metrics
	// OnPaneClose, if not nil, is called by a sensor's worker with the
	// window solution each time one of its panes closes (after that
	// solution went into the fit history, before it is judged). It runs
	// on the worker: keep it short, and do not keep sol past the call.
	OnPaneClose func(id string, window int, sol *rolling.Solution)
	// OnApplied, if not nil, is called by a sensor's worker after it
	// folded the readings of one message into the sensor (readings the
	// sensor refused as too old included), before they are committed.
	// It runs on the worker: keep it short, and do not keep readings past
	// the call. Nil costs nothing; driftfit bench uses it to time the way
	// from publish to fit.
	OnApplied func(id string, readings []rolling.Reading)
}

// Defaults of Options.
const (
	// DefaultStreamMaxBytes is 1 GiB: at about 60 bytes a stored reading
	// (JSON payload plus the server's per-message overhead, common
	// practice), some 16 million readings, 800 hours of 20,000 hourly
	// sensors while serve is down.
	DefaultStreamMaxBytes = 1 << 30
	// DefaultRejectedMaxBytes is 64 MiB of dead letters.
	DefaultRejectedMaxBytes = 64 << 20
	// DefaultMaxSensors is 200,000 sensors, about 1.6 GB of windows at
	// the 7.5 KiB a sensor measured for 1d/1h and 30d/1d (README,
	// Performance).
	DefaultMaxSensors = 200000
)

// DefaultRejectedSubject returns the default dead-letter subject for the
// readings prefix: the prefix with its last token replaced by "rejected"
// ("driftfit.in" gives "driftfit.rejected"), or "<prefix>_rejected" for a
// one-token prefix; either way outside <prefix>.>, which the readings
// stream captures.
func DefaultRejectedSubject(prefix string) string {
	if i := strings.LastIndexByte(prefix, '.'); i > 0 {
		return prefix[:i] + ".rejected"
	}
	return prefix + "_rejected"
}

func (o *Options) fill() error {
	if o.Conn == nil || o.DB == nil || o.Sensor == nil {
		return errors.New("ingest: Options need Conn, DB and Sensor")
	}
	if o.Mode == ModeUnknown {
		o.Mode = ModeStream
	}
	if o.SubjectPrefix == "" {
		o.SubjectPrefix = "driftfit.in"
	}
	if o.RejectedSubject == "" {
		o.RejectedSubject = DefaultRejectedSubject(o.SubjectPrefix)
	}
	if strings.HasPrefix(o.RejectedSubject, o.SubjectPrefix+".") {
		return fmt.Errorf("ingest: RejectedSubject %q lies under the readings subjects %s.>: choose one outside them", o.RejectedSubject, o.SubjectPrefix)
	}
	if o.StreamName == "" {
		o.StreamName = "DRIFTFIT"
	}
	if o.StreamMaxBytes <= 0 {
		o.StreamMaxBytes = DefaultStreamMaxBytes
	}
	if o.StreamMaxAge < 0 {
		return fmt.Errorf("ingest: StreamMaxAge %v is negative", o.StreamMaxAge)
	}
	if o.RejectedStream == "" {
		o.RejectedStream = o.StreamName + "_REJECTED"
	}
	if o.RejectedMaxBytes <= 0 {
		o.RejectedMaxBytes = DefaultRejectedMaxBytes
	}
	if o.RejectedMaxAge <= 0 {
		o.RejectedMaxAge = 7 * 24 * time.Hour
	}
	if o.MaxSensors <= 0 {
		o.MaxSensors = DefaultMaxSensors
	}
	if o.Durable == "" {
		o.Durable = "driftfit"
	}
	if o.Workers <= 0 {
		o.Workers = runtime.GOMAXPROCS(0)
	}
	if o.CommitInterval <= 0 {
		o.CommitInterval = time.Second
	}
	if o.CommitReadings <= 0 {
		o.CommitReadings = 1000000
	}
	if o.CommitMaxSensors <= 0 {
		o.CommitMaxSensors = 10000
	}
	if o.FutureSkew <= 0 {
		o.FutureSkew = 5 * time.Minute
	}
	if o.MaxPayload <= 0 {
		o.MaxPayload = DefaultMaxBytes
	}
	if o.CheckInterval <= 0 {
		o.CheckInterval = 10 * time.Second
	}
	if o.PurgeInterval <= 0 {
		o.PurgeInterval = 5 * time.Second
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.AlertSubjectPrefix == "" {
		o.AlertSubjectPrefix = "driftfit.alerts"
	}
	if o.TicketSubject == "" {
		o.TicketSubject = "driftfit.tickets"
	}
	if o.CalibrationSubjectPrefix == "" {
		o.CalibrationSubjectPrefix = "driftfit.calibrations"
	}
	if o.StopTimeout <= 0 {
		o.StopTimeout = 5 * time.Second
	}
	if w := &o.Webhook; w.URL != "" {
		if w.Timeout <= 0 {
			w.Timeout = 10 * time.Second
		}
		if w.FirstRetry <= 0 {
			w.FirstRetry = time.Second
		}
		if w.MaxBackoff <= 0 {
			w.MaxBackoff = 5 * time.Minute
		}
	}
	if o.Logger == nil {
		l := zerolog.Nop()
		o.Logger = &l
	}
	return nil
}

// Stats are the service's running totals.
type Stats struct {
	Messages uint64 // messages taken from the bus
	Applied  uint64 // readings applied to the fits (committed or not)
	Rejected uint64 // readings and payloads refused
	Sensors  int    // sensors held
	Routes   int    // sensor ids routed: the sensors, and new ids with readings in flight
	Position uint64 // stream sequence of the last committed message
	// Backlog says the last commit left changed sensors for the next
	// (Options.CommitMaxSensors).
	Backlog bool
}
