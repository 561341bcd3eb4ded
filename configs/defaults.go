package configs

import (
	"strings"
	"time"
)

// Default values, applied by applyDefaults to every field that is zero and
// was not written in the file.
const (
	defaultSubjectPrefix            = "driftfit.in"
	defaultAlertSubjectPrefix       = "driftfit.alerts"
	defaultTicketSubject            = "driftfit.tickets"
	defaultCalibrationSubjectPrefix = "driftfit.calibrations"
	defaultStreamName               = "DRIFTFIT"
	defaultEmbeddedHost             = "127.0.0.1"
	defaultMaxPayloadBytes          = 1 << 20 // NATS server default max_payload, from memory
	maxMaxPayloadBytes              = 64 << 20
	defaultFutureSkew               = 5 * time.Minute
	defaultStreamMaxBytes           = 1 << 30
	defaultRejectedMaxBytes         = 64 << 20
	defaultRejectedMaxAge           = 7 * Day
	defaultMaxSensors               = 200000
	defaultStoreDir                 = "./data"
	defaultCommitInterval           = time.Second
	defaultCommitReadings           = 1000000
	defaultCommitMaxSensors         = 10000
	defaultHistoryRetention         = 400 * Day
	defaultHTTPAddr                 = "127.0.0.1:9464"
	defaultMinReadings              = 30
	defaultMinCoverage              = 0.5
	defaultDebounce                 = 3
	defaultClearFraction            = 0.8
	defaultCooldown                 = 24 * time.Hour
	// One false ticket in a hundred sensor-years (our choice): a fleet
	// of 1,000 sensors then sees one false ticket in about a month.
	defaultFalseTicketsPerYear = 0.01
	// Ten seconds is long enough for a receiver that writes the ticket
	// into a database before answering, short enough that a hung receiver
	// does not hold up the deliveries queued behind it (our choice).
	defaultWebhookTimeout = 10 * time.Second
	// Retries back off up to five minutes, so a receiver back from an
	// outage gets its tickets within minutes without being hammered
	// while it is down (our choice).
	defaultWebhookMaxBackoff = 5 * time.Minute
)

func defaultWindows() []Window {
	return []Window{{Span: Day, Pane: time.Hour}, {Span: 30 * Day, Pane: Day}}
}

// written reports whether the field at path was present in the file.
func (c *Config) written(path string) bool {
	_, ok := c.pos[path]
	return ok
}

// applyDefaults fills every field that is zero and was not written in the
// file with its documented default. It is the only place defaults are set.
func (c *Config) applyDefaults() {
	str := func(dst *string, path, def string) {
		if *dst == "" && !c.written(path) {
			*dst = def
		}
	}
	dur := func(dst *time.Duration, path string, def time.Duration) {
		if *dst == 0 && !c.written(path) {
			*dst = def
		}
	}
	num := func(dst *int, path string, def int) {
		if *dst == 0 && !c.written(path) {
			*dst = def
		}
	}
	flt := func(dst *float64, path string, def float64) {
		if *dst == 0 && !c.written(path) {
			*dst = def
		}
	}

	b := &c.Bus
	str(&b.SubjectPrefix, "bus.subject_prefix", defaultSubjectPrefix)
	str(&b.RejectedSubject, "bus.rejected_subject", defaultRejectedSubject(b.SubjectPrefix))
	str(&b.AlertSubjectPrefix, "bus.alert_subject_prefix", defaultAlertSubjectPrefix)
	str(&b.TicketSubject, "bus.ticket_subject", defaultTicketSubject)
	str(&b.CalibrationSubjectPrefix, "bus.calibration_subject_prefix", defaultCalibrationSubjectPrefix)
	if b.Mode == ModeUnknown && !c.written("bus.mode") {
		b.Mode = ModeStream
	}
	str(&b.StreamName, "bus.stream_name", defaultStreamName)
	str(&b.Embedded.Host, "bus.embedded.host", defaultEmbeddedHost)
	num(&b.MaxPayloadBytes, "bus.max_payload_bytes", defaultMaxPayloadBytes)
	dur(&b.FutureSkew, "bus.future_skew", defaultFutureSkew)
	num(&b.StreamMaxBytes, "bus.stream_max_bytes", defaultStreamMaxBytes)
	num(&b.RejectedMaxBytes, "bus.rejected_max_bytes", defaultRejectedMaxBytes)
	dur(&b.RejectedMaxAge, "bus.rejected_max_age", defaultRejectedMaxAge)
	num(&b.MaxSensors, "bus.max_sensors", defaultMaxSensors)

	s := &c.Store
	str(&s.Dir, "store.dir", defaultStoreDir)
	dur(&s.CommitInterval, "store.commit_interval", defaultCommitInterval)
	num(&s.CommitReadings, "store.commit_readings", defaultCommitReadings)
	num(&s.CommitMaxSensors, "store.commit_max_sensors", defaultCommitMaxSensors)
	dur(&s.HistoryRetention, "store.history_retention", defaultHistoryRetention)
	dur(&s.HistoryThinAfter, "store.history_thin_after", 30*Day)
	dur(&s.HistoryThinTo, "store.history_thin_to", Day)

	str(&c.HTTP.Addr, "http.addr", defaultHTTPAddr)

	wh := &c.Tickets.Webhook
	dur(&wh.Timeout, "tickets.webhook.timeout", defaultWebhookTimeout)
	dur(&wh.MaxBackoff, "tickets.webhook.max_backoff", defaultWebhookMaxBackoff)

	if len(c.Defaults.Windows) == 0 && !c.written("defaults.windows") {
		c.Defaults.Windows = defaultWindows()
	}

	for i := range c.Classes {
		cl := &c.Classes[i]
		p := classPath(i)
		if len(cl.Windows) == 0 && !c.written(p+".windows") {
			cl.Windows = append([]Window(nil), c.Defaults.Windows...)
		}
		if cl.TrendModel == TrendUnknown && !c.written(p+".trend_model") {
			cl.TrendModel = TrendLine
		}
		num(&cl.MinReadings, p+".min_readings", defaultMinReadings)
		flt(&cl.MinCoverage, p+".min_coverage", defaultMinCoverage)
		num(&cl.Debounce, p+".debounce", defaultDebounce)
		flt(&cl.ClearFraction, p+".clear_fraction", defaultClearFraction)
		dur(&cl.Cooldown, p+".cooldown", defaultCooldown)
		flt(&cl.AlarmBudget.FalseTicketsPerYear, p+".alarm_budget.false_tickets_per_year", defaultFalseTicketsPerYear)
		flt(&cl.AlarmBudget.AlertsPerYear, p+".alarm_budget.alerts_per_year", cl.AlarmBudget.FalseTicketsPerYear)
	}
}

// defaultRejectedSubject is the readings prefix with its last token
// replaced by "rejected" ("driftfit.in" gives "driftfit.rejected"), or
// "<prefix>_rejected" for a one-token prefix: outside <prefix>.>, which
// the readings stream captures. ingest.DefaultRejectedSubject is the same
// rule.
func defaultRejectedSubject(prefix string) string {
	if i := strings.LastIndexByte(prefix, '.'); i > 0 {
		return prefix[:i] + ".rejected"
	}
	return prefix + "_rejected"
}
