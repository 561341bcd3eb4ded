package ingest

import "github.com/prometheus/client_golang/prometheus"

// Metrics are the service's Prometheus instruments. Register them with
// Register; a nil *Metrics records nothing.
type Metrics struct {
	Messages     prometheus.Counter
	Applied      prometheus.Counter
	Rejected     *prometheus.CounterVec // by reason
	Sensors      prometheus.Gauge
	CommitTime   prometheus.Histogram
	CommitBytes  prometheus.Counter
	StreamLag    prometheus.Gauge
	BusConnected prometheus.Gauge
	SlowConsumer prometheus.Counter
	// SetAside counts sensors whose stored state failed its checks: set
	// aside at a restore (restarted fresh) or left out of a commit.
	SetAside prometheus.Counter
	// Spikes counts readings the spike detector kept out of the fits.
	Spikes prometheus.Counter
	// NotJudged holds, per reason, the sensor windows whose latest
	// evaluation was not judged (alert.Reason).
	NotJudged *prometheus.GaugeVec

	StreamBytes      prometheus.Gauge
	StreamLimitBytes prometheus.Gauge
	StreamRefetch    prometheus.Counter
	StreamLost       prometheus.Counter
	// ServerLog counts the embedded server's warnings and errors, by
	// level; ServerSlowConsumers is the embedded server's own count of
	// slow consumers it cut off.
	ServerLog           *prometheus.CounterVec
	ServerSlowConsumers prometheus.Gauge

	// tickets counts the running service's open and overdue tickets at
	// each scrape (driftfit_tickets_open, driftfit_tickets_overdue).
	tickets *ticketGauges
}

// NewMetrics returns the instruments, not yet registered.
func NewMetrics() *Metrics {
	return &Metrics{
		tickets: newTicketGauges(),
		SetAside: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "driftfit_sensors_set_aside_total", Help: "Sensors whose stored state failed its checks and was set aside.",
		}),
		Messages: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "driftfit_messages_total", Help: "Messages taken from the bus.",
		}),
		Applied: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "driftfit_readings_applied_total", Help: "Readings applied to the fits.",
		}),
		Rejected: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "driftfit_readings_rejected_total", Help: "Readings (or whole payloads) refused, by reason.",
		}, []string{"reason"}),
		Sensors: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "driftfit_sensors_live", Help: "Sensors held in memory.",
		}),
		CommitTime: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "driftfit_commit_seconds", Help: "Time to write one commit to the state file, fsync included.",
			Buckets: prometheus.ExponentialBuckets(0.0005, 2, 14),
		}),
		CommitBytes: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "driftfit_commit_bytes_total", Help: "Key and value bytes written to the state file.",
		}),
		StreamLag: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "driftfit_stream_lag_messages", Help: "Messages in the stream not yet delivered to driftfit (stream mode).",
		}),
		BusConnected: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "driftfit_bus_connected", Help: "1 while connected to the NATS bus, else 0.",
		}),
		SlowConsumer: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "driftfit_slow_consumer_total", Help: "Slow-consumer events on the bus connection (direct mode drops messages then).",
		}),
		Spikes: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "driftfit_readings_spikes_total", Help: "Readings the spike detector kept out of the fits.",
		}),
		NotJudged: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "driftfit_windows_not_judged", Help: "Sensor windows whose latest evaluation was not judged, by reason.",
		}, []string{"reason"}),
		StreamBytes: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "driftfit_stream_bytes", Help: "Bytes held by the readings stream (stream mode): what is not yet committed.",
		}),
		StreamLimitBytes: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "driftfit_stream_limit_bytes", Help: "The readings stream's byte limit; producers are refused when it is reached.",
		}),
		StreamRefetch: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "driftfit_stream_refetch_total", Help: "Gaps in the delivered stream sequence, each read again from the last applied message.",
		}),
		StreamLost: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "driftfit_stream_lost_messages_total", Help: "Stream messages gone before they were applied (aged out or deleted).",
		}),
		ServerLog: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "driftfit_bus_server_log_total", Help: "Warnings and errors logged by the embedded NATS server, by level (it drops messages with a warning).",
		}, []string{"level"}),
		ServerSlowConsumers: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "driftfit_bus_server_slow_consumers", Help: "Clients the embedded NATS server cut off as slow consumers since it started.",
		}),
	}
}

// Register registers every instrument with r.
func (m *Metrics) Register(r prometheus.Registerer) error {
	for _, c := range []prometheus.Collector{m.Messages, m.Applied, m.Rejected, m.Sensors, m.CommitTime, m.CommitBytes, m.StreamLag, m.BusConnected, m.SlowConsumer, m.SetAside, m.Spikes, m.NotJudged,
		m.StreamBytes, m.StreamLimitBytes, m.StreamRefetch, m.StreamLost, m.ServerLog, m.ServerSlowConsumers, m.tickets} {
		if err := r.Register(c); err != nil {
			return err
		}
	}
	return nil
}
