// Package bench measures the service as serve builds it (decode,
// validate, windows, alert evaluation, bbolt commits with fsync) against
// a subscriber that only counts or acks the same messages, on one bus in
// one run: throughput, publish-to-fit and alert latency, and the restart
// and memory of large fleets. It judges no speed: Report.Check fails only
// a run that measured nothing or produced a number that is not finite.
package bench

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"runtime"
	"runtime/debug"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"text/tabwriter"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/demo"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// benchFleetSmall is the smaller fleet of the memory and restart phase.
const benchFleetSmall = 10000

// benchChanged is the count of sensors that receive a reading between two
// commits in the fleet phase: what a commit writes should follow it, not
// the fleet size.
const benchChanged = 1000

// Options configure a run.
type Options struct {
	// Duration is the time of the throughput and latency phases, shared
	// among them (at least 1 s).
	Duration time.Duration
	// Sensors is the count the publisher feeds in those phases (≥ 1).
	Sensors int
	// SensorsMax is the largest fleet of the memory and restart phase,
	// also run at 10,000 when larger; 0 skips the phase.
	SensorsMax int
	// Servers are comma-separated NATS URLs to use instead of an
	// embedded server.
	Servers string
	// Serve is how the binary builds what serve runs.
	Serve Wiring
}

// Bus is a connection to the bus, and the embedded server if the
// connection is to one.
type Bus struct {
	Conn   *nats.Conn
	Server *server.Server // nil on an outside server
	Close  func()
}

// Wiring is what the bench takes from the binary, so that it measures
// the service as serve builds it.
type Wiring struct {
	// Connect connects to cfg's bus as serve does, starting an embedded
	// server on any free port when cfg names no servers.
	Connect func(cfg *configs.Config) (*Bus, error)
	// IngestOptions maps cfg onto the service's options as serve does,
	// alert rules, subjects and webhook included.
	// The bench sets Conn.
	IngestOptions func(cfg *configs.Config, db *store.DB, log *zerolog.Logger, m *ingest.Metrics) ingest.Options
}

// dbFile is the state file's name in each pipeline's directory.
const dbFile = "driftfit.db"

// Report is what a run measured; its JSON form is the --json output.
type Report struct {
	Date       string            `json:"date"`
	CPUs       int               `json:"cpus"`
	CPUModel   string            `json:"cpu_model"`
	Go         string            `json:"go"`
	Bus        string            `json:"bus"`
	Duration   string            `json:"duration"`
	Sensors    int               `json:"sensors"`
	Windows    string            `json:"windows"`
	Throughput []benchThroughput `json:"throughput"`
	Latency    benchLatency      `json:"latency"`
	Alerts     []benchAlert      `json:"alert_latency"`
	Fleets     []benchFleet      `json:"fleets"`
	Notes      []string          `json:"notes"`
}

// benchThroughput is one delivery case: the pipeline and its baseline on
// the same messages. The frequent case reuses the baseline of the case
// it repeats with other commit settings.
type benchThroughput struct {
	Case       string `json:"case"`
	Mode       string `json:"mode"`
	PerMessage int    `json:"readings_per_message"`
	// Commit is the pipeline's store.commit_interval and
	// store.commit_readings, passed to ingest as serve passes them.
	Commit string `json:"commit"`
	// Readings applied by the pipeline in Seconds of publishing.
	Readings        uint64  `json:"readings_applied"`
	Seconds         float64 `json:"seconds"`
	AppliedPerSec   float64 `json:"applied_per_s"`
	CommittedPerSec float64 `json:"committed_per_s"`
	// Baseline is "count" (a core subscriber that only counts) or "ack"
	// (a JetStream consumer that only acknowledges).
	Baseline       string  `json:"baseline"`
	BaselinePerSec float64 `json:"baseline_per_s"`
	Ratio          float64 `json:"ratio"`
	// Commits and the key and value bytes they put (store.CommitStats),
	// the mean commit time with fsync, and the bytes the whole process
	// wrote to disk meanwhile (/proc/self/io; -1 if unknown).
	Commits        int     `json:"commits"`
	BytesPerCommit float64 `json:"bytes_per_commit"`
	BytesPerSec    float64 `json:"bytes_per_s"`
	CommitMs       float64 `json:"commit_ms_mean"`
	DiskPerSec     float64 `json:"disk_bytes_per_s"`
	// Lost counts messages the publisher gave up waiting for (baseline
	// and pipeline together); SlowConsumers the slow-consumer events the
	// embedded server reported meanwhile. Both should be zero.
	Lost          uint64 `json:"lost_messages"`
	SlowConsumers uint64 `json:"server_slow_consumers"`
}

// benchLatency is the time from publishing a reading to the worker having
// folded it into the sensor's windows, at a steady offered load.
type benchLatency struct {
	Mode          string  `json:"mode"`
	OfferedPerSec float64 `json:"offered_per_s"`
	Samples       int     `json:"samples"`
	P50Ms         float64 `json:"p50_ms"`
	P99Ms         float64 `json:"p99_ms"`
	MaxMs         float64 `json:"max_ms"`
}

// benchAlert is the time from probe readings that put a sensor's slope
// over its limit to the raised alert on the bus, under one offered load.
// Rules are judged when a pane closes, and the first reading in the next
// pane is what closes it, so the evaluation interval is the pane width.
type benchAlert struct {
	Sensors       int     `json:"sensors"` // sensors fed besides the probes (under load), warmed up before
	Load          string  `json:"load"`
	OfferedPerSec float64 `json:"offered_per_s"` // background readings, besides the probes
	Interval      string  `json:"evaluation_interval"`
	Probes        int     `json:"probes"`
	Raised        int     `json:"raised"`
	// OffPane counts alerts judged at another pane close than the first
	// after the crossing reading; zero when the probes work as designed.
	OffPane int `json:"judged_off_pane"`
	// Close*: from publishing the reading that closed the pane (the
	// probe's first reading in the next pane, which triggers the
	// evaluation) to receiving the raised event.
	CloseP50Ms float64 `json:"close_to_alert_p50_ms"`
	CloseP99Ms float64 `json:"close_to_alert_p99_ms"`
	CloseMaxMs float64 `json:"close_to_alert_max_ms"`
	// Cross*: from publishing the crossing reading (the one from which a
	// fit of the window is over the limit) to receiving the raised event;
	// it includes the wait for the pane to close.
	CrossP50Ms float64 `json:"cross_to_alert_p50_ms"`
	CrossP99Ms float64 `json:"cross_to_alert_p99_ms"`
	CrossMaxMs float64 `json:"cross_to_alert_max_ms"`
}

// benchFleet is a restart of the service on a file holding a fleet with
// full windows, the memory it then holds, and commits of a few changed
// sensors in that fleet.
type benchFleet struct {
	Sensors        int     `json:"sensors"`
	PanesPerSensor float64 `json:"panes_per_sensor"`
	FileBytes      int64   `json:"file_bytes"`
	OpenMs         float64 `json:"open_ms"`
	RestoreMs      float64 `json:"restore_ms"`
	HeapPerSensor  float64 `json:"heap_bytes_per_sensor"`
	RSSPerSensor   float64 `json:"rss_anon_bytes_per_sensor"`
	Changed        int     `json:"changed_per_commit"`
	Commits        int     `json:"commits"`
	BytesPerCommit float64 `json:"bytes_per_commit"`
	CommitMs       float64 `json:"commit_ms_mean"`
	DiskPerCommit  float64 `json:"disk_bytes_per_commit"`
}

// Check fails a run that measured nothing or produced a number that is
// not finite; it never judges speed.
func (r *Report) Check() error {
	var errs []error
	finite := func(what string, vs ...float64) {
		for _, v := range vs {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				errs = append(errs, fmt.Errorf("bench: %s: a result is %v", what, v))
				return
			}
		}
	}
	for _, t := range r.Throughput {
		if t.Readings == 0 {
			errs = append(errs, fmt.Errorf("bench: %s: no reading applied", t.Case))
		}
		if t.BaselinePerSec <= 0 {
			errs = append(errs, fmt.Errorf("bench: %s: the baseline received nothing", t.Case))
		}
		finite(t.Case, t.AppliedPerSec, t.CommittedPerSec, t.BaselinePerSec, t.Ratio, t.BytesPerCommit, t.BytesPerSec, t.CommitMs, t.DiskPerSec)
	}
	if r.Latency.Samples == 0 {
		errs = append(errs, errors.New("bench: latency: no probe reading came through"))
	}
	finite("latency", r.Latency.OfferedPerSec, r.Latency.P50Ms, r.Latency.P99Ms, r.Latency.MaxMs)
	for _, a := range r.Alerts {
		what := "alert latency, " + a.Load
		what = fmt.Sprintf("%s, %d sensors", what, a.Sensors)
		if a.Raised < a.Probes {
			errs = append(errs, fmt.Errorf("bench: %s: %d of %d probes raised no alert", what, a.Probes-a.Raised, a.Probes))
		}
		finite(what, a.OfferedPerSec, a.CloseP50Ms, a.CloseP99Ms, a.CloseMaxMs, a.CrossP50Ms, a.CrossP99Ms, a.CrossMaxMs)
	}
	for _, f := range r.Fleets {
		what := fmt.Sprintf("fleet of %d", f.Sensors)
		if f.Commits == 0 {
			errs = append(errs, fmt.Errorf("bench: %s: no commit of changed sensors", what))
		}
		finite(what, f.PanesPerSensor, f.OpenMs, f.RestoreMs, f.HeapPerSensor, f.RSSPerSensor, f.BytesPerCommit, f.CommitMs, f.DiskPerCommit)
	}
	return errors.Join(errs...)
}

// benchEnv is what every phase shares: the configuration serve would use
// with no file (default windows), the bus, a temporary directory.
type benchEnv struct {
	cfg   *configs.Config
	bus   *Bus
	wire  Wiring
	dir   string
	log   zerolog.Logger
	tag   string // keeps subjects and the stream apart from other runs on a shared bus
	specs []rolling.WindowSpec
	fleet []demo.Sensor
}

// Run measures every phase in turn, writing a line on progress as each
// starts; log gets the service's warnings.
func Run(ctx context.Context, o Options, log zerolog.Logger, progress io.Writer) (*Report, error) {
	dir, err := os.MkdirTemp("", "driftfit-bench-")
	if err != nil {
		return nil, err
	}
	defer os.RemoveAll(dir)
	cfg, err := configs.Parse("(defaults)", []byte("{}"))
	if err != nil {
		return nil, err
	}
	cfg.Store.Dir = dir
	if o.Servers != "" {
		cfg.Bus.Servers = strings.Split(o.Servers, ",")
	}
	bus, err := o.Serve.Connect(cfg)
	if err != nil {
		return nil, err
	}
	defer bus.Close()
	if !waitUntil(ctx, 10*time.Second, bus.Conn.IsConnected) {
		return nil, fmt.Errorf("bench: not connected to %s after 10s", o.Servers)
	}
	e := &benchEnv{cfg: cfg, bus: bus, wire: o.Serve, dir: dir, log: log, tag: strconv.FormatUint(rand.Uint64()&0xffffff, 36)}
	// The windows serve gives a sensor no class matches; only the
	// mapping is asked for, so no file or metrics are needed.
	sc, _ := o.Serve.IngestOptions(cfg, nil, &log, nil).Sensor("bench")
	e.specs = sc.Windows
	e.fleet = demo.Fleet(max(o.Sensors, o.SensorsMax))

	rep := &Report{
		Date:     time.Now().UTC().Format(time.RFC3339),
		CPUs:     runtime.NumCPU(),
		CPUModel: cpuModel(),
		Go:       runtime.Version(),
		Bus:      "embedded NATS server, 127.0.0.1",
		Duration: o.Duration.String(),
		Sensors:  o.Sensors,
		Windows:  specsString(e.specs),
	}
	if o.Servers != "" {
		rep.Bus = bus.Conn.ConnectedUrlRedacted()
	}
	rep.Notes = append(rep.Notes,
		"pipeline: decode, validate, every window of every sensor, alert evaluation at pane closes, bbolt commits with fsync, acks (stream), wired as serve wires them; the default configuration has no sensor classes, so in the throughput and publish-to-fit phases no alert rule applies and evaluation costs next to nothing",
		"baseline: the same messages, published the same way, received by a core subscriber that only counts (direct) or a JetStream consumer that only acks each message (stream)",
		"publisher: keeps at most a window of messages ahead of what the receiver took, so neither side drops; it shares the CPUs with both")

	// Eight equal slots: three cases with a baseline and a pipeline each,
	// filling the stream, and the latency phase.
	slot := o.Duration / 8
	step := func(what string) { fmt.Fprintf(progress, "bench: %s\n", what) }

	sensors := e.fleet[:o.Sensors]
	for _, per := range []int{1, 100} {
		step(fmt.Sprintf("direct, %d per message", per))
		pool := e.makePool(sensors, per, "bench"+e.tag+".d")
		t, err := e.directCase(ctx, pool, slot)
		if err != nil {
			return nil, err
		}
		rep.Throughput = append(rep.Throughput, t)
		if per != 1 {
			continue
		}
		// The same messages against the same baseline, with more
		// frequent, smaller commits: every sensor changes between two
		// commits at one reading a message, so what a commit writes does
		// not shrink with the readings it holds. It shows what serve's
		// commit settings buy.
		frequent, err := e.commitConfig(benchFrequentInterval, benchFrequentReadings)
		if err != nil {
			return nil, err
		}
		step(fmt.Sprintf("direct, %d per message, commits %s", per, commitString(frequent)))
		tt := benchThroughput{Case: t.Case + " frequent", Mode: t.Mode, PerMessage: per, Baseline: t.Baseline, BaselinePerSec: t.BaselinePerSec}
		if err := e.directPipeline(ctx, frequent, pool, slot, &tt); err != nil {
			return nil, err
		}
		rep.Throughput = append(rep.Throughput, tt)
	}
	step("stream, 100 per message")
	t, err := e.streamCase(ctx, e.makePool(sensors, 100, "bench"+e.tag+".s"), slot)
	if err != nil {
		return nil, err
	}
	rep.Throughput = append(rep.Throughput, t)

	step("latency")
	offered := rep.Throughput[0].AppliedPerSec / 2
	if rep.Latency, err = e.latency(ctx, e.makePool(sensors, 1, "bench"+e.tag+".l"), offered, slot); err != nil {
		return nil, err
	}
	// Alert latency at the fleet of the throughput phases and at the
	// largest one: a commit's time grows with the sensors it writes, and
	// a decision must not wait for a commit of the whole fleet.
	alertFleets := []int{o.Sensors}
	if o.SensorsMax > o.Sensors {
		alertFleets = append(alertFleets, o.SensorsMax)
	}
	for _, n := range alertFleets {
		step(fmt.Sprintf("alert latency, %d sensors", n))
		as, err := e.alertLatency(ctx, e.makePool(e.fleet[:n], 1, fmt.Sprintf("bench%s.a%d", e.tag, n)), offered, max(slot, time.Second))
		if err != nil {
			return nil, err
		}
		for i := range as {
			as[i].Sensors = n
		}
		rep.Alerts = append(rep.Alerts, as...)
	}
	rep.Notes = append(rep.Notes, benchAlertNote)

	var sizes []int
	if o.SensorsMax > benchFleetSmall {
		sizes = append(sizes, benchFleetSmall)
	}
	if o.SensorsMax > 0 {
		sizes = append(sizes, o.SensorsMax)
	}
	for _, n := range sizes {
		step(fmt.Sprintf("fleet of %d sensors: build the file, restart, commits", n))
		f, err := e.fleetCase(ctx, e.fleet[:n])
		if err != nil {
			return nil, err
		}
		rep.Fleets = append(rep.Fleets, f)
	}
	if len(rep.Fleets) > 0 {
		rep.Notes = append(rep.Notes,
			"fleet: the file is built through store.Batch with full windows (one reading in every pane), then a fresh service opens it with fsync on and restores every sensor; the file is in the page cache (a warm restart)",
			"fleet memory: heap in use and anonymous RSS after a GC, before and after the restore, divided by the sensors; RSS includes what the runtime keeps for reuse")
	}
	return rep, nil
}

// Commit settings of the frequent direct case with one reading a
// message: a tenth of serve's default readings and a fifth of its
// interval.
const (
	benchFrequentInterval = 200 * time.Millisecond
	benchFrequentReadings = 10000
)

// benchPool is a set of encoded messages the publisher cycles through.
type benchPool struct {
	prefix   string
	per      int // readings per message
	subjects []string
	data     [][]byte
	bytes    int // total payload bytes
}

// benchPoolBytes bounds the memory of one pool. A pool repeats once sent
// in full: the readings land again in the same open panes, which is
// work of the same kind.
const benchPoolBytes = 32 << 20

// makePool encodes readings of the demo sensors, per readings a message:
// single readings 10 s apart, round-robin over the sensors, or batches of
// per readings 1 s apart, one batch per sensor. Times end a minute ago.
func (e *benchEnv) makePool(sensors []demo.Sensor, per int, prefix string) *benchPool {
	p := &benchPool{prefix: prefix, per: per}
	rng := rand.New(rand.NewPCG(uint64(per), 7))
	subj := make([]string, len(sensors))
	for i := range sensors {
		subj[i] = prefix + "." + sensors[i].ID
	}
	end := time.Now().Add(-time.Minute).Truncate(time.Second)
	if per == 1 {
		msgs := min(len(sensors)*20, benchPoolBytes/64)
		steps := (msgs + len(sensors) - 1) / len(sensors)
		for k := range msgs {
			i, step := k%len(sensors), k/len(sensors)
			at := end.Add(-time.Duration(steps-step) * 10 * time.Second)
			d := float64(at.Unix()%(30*86400)) / 86400
			buf := ingest.AppendReading(nil, ingest.Decoded{Reading: rolling.Reading{UnixNano: at.UnixNano(), Value: sensors[i].Value(d, rng)}})
			p.subjects, p.data = append(p.subjects, subj[i]), append(p.data, buf)
			p.bytes += len(buf)
		}
		return p
	}
	rs := make([]rolling.Reading, per)
	for i := range sensors {
		for j := range rs {
			at := end.Add(-time.Duration(per-j) * time.Second)
			d := float64(at.Unix()%(30*86400)) / 86400
			rs[j] = rolling.Reading{UnixNano: at.UnixNano(), Value: sensors[i].Value(d, rng)}
		}
		buf := ingest.AppendBatch(nil, sensors[i].ID, rs)
		p.subjects, p.data = append(p.subjects, subj[i]), append(p.data, buf)
		p.bytes += len(buf)
		if p.bytes > benchPoolBytes {
			break
		}
	}
	return p
}

// window returns how many messages the publisher may be ahead of the
// receiver: 16 MiB of payload, well inside the 256 MiB and million
// messages the subscriptions hold before they drop.
func (p *benchPool) window() uint64 {
	avg := max(1, p.bytes/len(p.data))
	return uint64(min(100000, (16<<20)/avg))
}

// publish sends the pool's messages in turn until the deadline, never
// more than window ahead of taken(), and returns the count sent and the
// count it gave up on: when taken() stays still for benchStall with the
// window full, the messages in flight are taken as lost (dropped by a
// slow consumer somewhere) and publishing goes on.
func (p *benchPool) publish(ctx context.Context, nc *nats.Conn, until time.Time, taken func() uint64) (sent, lost uint64, err error) {
	win := p.window()
	for i := 0; ; i++ {
		if i&63 == 0 {
			if ctx.Err() != nil || time.Now().After(until) {
				return sent, lost, nc.Flush()
			}
			last, since := taken(), time.Now()
			for sent-min(sent, last+lost) > win {
				time.Sleep(100 * time.Microsecond)
				now := time.Now()
				if now.After(until) {
					return sent, lost, nc.Flush()
				}
				if t := taken(); t != last {
					last, since = t, now
				} else if now.Sub(since) > benchStall {
					lost = sent - last
				}
			}
		}
		k := i % len(p.data)
		if err := nc.Publish(p.subjects[k], p.data[k]); err != nil {
			return sent, lost, err
		}
		sent++
	}
}

// benchStall is how long a receiver may take nothing before the
// publisher counts what it has in flight as lost.
const benchStall = 250 * time.Millisecond

// slowConsumers returns the embedded server's count of slow-consumer
// events, 0 on an outside server.
func (e *benchEnv) slowConsumers() uint64 {
	if e.bus.Server == nil {
		return 0
	}
	return uint64(e.bus.Server.NumSlowConsumers())
}

// connect opens another connection to the bench's bus, of the same kind
// as the pipeline's.
func (e *benchEnv) connect() (*nats.Conn, error) {
	if e.bus.Server != nil {
		return nats.Connect(e.bus.Server.ClientURL(), nats.InProcessServer(e.bus.Server))
	}
	return nats.Connect(strings.Join(e.cfg.Bus.Servers, ","))
}

// benchPipeline is one service as serve builds it, on its own state file.
type benchPipeline struct {
	svc    *ingest.Service
	db     *store.DB
	m      *ingest.Metrics
	opened time.Duration // store.Open
	cancel context.CancelFunc
	done   chan error

	stopOnce sync.Once
	stopErr  error
}

// startPipeline opens (or creates) the state file at path and runs a
// service on it with the options serve derives from cfg, overriding the
// delivery mode, subject prefix and stream.
func (e *benchEnv) startPipeline(ctx context.Context, cfg *configs.Config, path string, mode ingest.Mode, prefix, stream string, onApplied func(string, []rolling.Reading)) (*benchPipeline, error) {
	if err := os.MkdirAll(filepath.Dir(path), 0o700); err != nil {
		return nil, err
	}
	t0 := time.Now()
	db, err := store.Open(path, store.Options{})
	if err != nil {
		return nil, err
	}
	opened := time.Since(t0)
	m := ingest.NewMetrics()
	// The probes raise alerts on purpose: keep them out of the log.
	quiet := e.log.Level(zerolog.ErrorLevel)
	opts := e.wire.IngestOptions(cfg, db, &quiet, m)
	opts.Conn = e.bus.Conn
	opts.Mode, opts.SubjectPrefix, opts.StreamName = mode, prefix, stream
	opts.RejectedSubject = ""    // the default for the prefix
	opts.AcceptDuplicates = true // a pool repeats once sent in full
	opts.OnApplied = onApplied
	p, err := startService(ctx, opts)
	if err != nil {
		db.Close()
		return nil, err
	}
	p.db, p.m, p.opened = db, m, opened
	return p, nil
}

// startService is how the bench builds and runs a service: ingest.New on
// opts, which hold the alert flow too, run until the pipeline stops. It
// is the one place the bench builds a service, to switch to the
// constructor serve uses.
func startService(ctx context.Context, opts ingest.Options) (*benchPipeline, error) {
	svc, err := ingest.New(opts)
	if err != nil {
		return nil, err
	}
	runCtx, cancel := context.WithCancel(ctx)
	p := &benchPipeline{svc: svc, cancel: cancel, done: make(chan error, 1)}
	go func() { p.done <- svc.Run(runCtx) }()
	return p, nil
}

// stop shuts the service down (it commits what it applied) and closes
// the file.
// Later calls return the first call's result.
func (p *benchPipeline) stop() error {
	p.stopOnce.Do(func() {
		p.cancel()
		err := <-p.done
		p.stopErr = errors.Join(err, p.db.Close())
	})
	return p.stopErr
}

// waitLive publishes a reading to probe until the direct subscription is
// live, as core NATS keeps nothing for late subscribers.
func (p *benchPipeline) waitLive(ctx context.Context, nc *nats.Conn, subject string) error {
	msg := ingest.AppendReading(nil, ingest.Decoded{Reading: rolling.Reading{UnixNano: time.Now().Add(-time.Minute).UnixNano(), Value: 1}})
	ok := waitUntil(ctx, 10*time.Second, func() bool {
		_ = nc.Publish(subject, msg)
		_ = nc.Flush()
		return p.svc.Stats().Applied > 0
	})
	if !ok {
		return fmt.Errorf("bench: no reading on %s applied within 10s", subject)
	}
	return nil
}

// warmUp sends one message for every sensor of the pool and waits until
// they are applied and committed: a sensor's windows are allocated with
// its first reading, which is not the steady state to measure.
func (p *benchPipeline) warmUp(ctx context.Context, nc *nats.Conn, pool *benchPool) error {
	want := p.svc.Stats().Applied
	seen := map[string]bool{}
	for k, subj := range pool.subjects {
		if seen[subj] {
			continue
		}
		seen[subj] = true
		if err := nc.Publish(subj, pool.data[k]); err != nil {
			return err
		}
		want += uint64(pool.per)
	}
	if err := nc.Flush(); err != nil {
		return err
	}
	if !waitUntil(ctx, time.Minute, func() bool { return p.svc.Stats().Applied >= want }) {
		return errors.New("bench: warm-up readings not applied within a minute")
	}
	// Every sensor was touched: let the commits that write them all (a
	// few, each of at most store.commit_max_sensors) finish, so the phase
	// starts from a service at rest.
	_, err := p.committed(ctx, want)
	return err
}

// committed waits until the file holds at least n applied readings and
// returns when that was seen.
func (p *benchPipeline) committed(ctx context.Context, n uint64) (time.Time, error) {
	var err error
	ok := waitUntil(ctx, time.Minute, func() bool {
		var got uint64
		got, err = p.db.Applied()
		return err == nil && got >= n
	})
	if err != nil {
		return time.Time{}, err
	}
	if !ok {
		return time.Time{}, fmt.Errorf("bench: %d readings not committed within a minute", n)
	}
	return time.Now(), nil
}

// commitStats reads the commit count, the key and value bytes and the
// commit time so far.
func (p *benchPipeline) commitStats() (n int, bytes, seconds float64) {
	var m dto.Metric
	if err := p.m.CommitTime.Write(&m); err == nil {
		n, seconds = int(m.GetHistogram().GetSampleCount()), m.GetHistogram().GetSampleSum()
	}
	return n, counterValue(p.m.CommitBytes), seconds
}

func counterValue(c prometheus.Counter) float64 {
	var m dto.Metric
	if err := c.Write(&m); err != nil {
		return 0
	}
	return m.GetCounter().GetValue()
}

// directCase measures direct mode: the baseline subscriber, then the
// pipeline, each fed from the pool for one slot.
func (e *benchEnv) directCase(ctx context.Context, pool *benchPool, slot time.Duration) (benchThroughput, error) {
	out := benchThroughput{Case: fmt.Sprintf("direct %d/msg", pool.per), Mode: "direct", PerMessage: pool.per, Baseline: "count"}
	slow0 := e.slowConsumers()
	pub, err := e.connect()
	if err != nil {
		return out, err
	}
	defer pub.Close()

	// Baseline: a subscriber on its own connection that only counts.
	base, err := e.connect()
	if err != nil {
		return out, err
	}
	var got atomic.Uint64
	sub, err := base.Subscribe(pool.prefix+".>", func(*nats.Msg) { got.Add(1) })
	if err == nil {
		err = sub.SetPendingLimits(1<<20, 256<<20)
	}
	if err == nil {
		err = base.Flush()
	}
	if err != nil {
		base.Close()
		return out, err
	}
	t0 := time.Now()
	_, lost, err := pool.publish(ctx, pub, t0.Add(slot), got.Load)
	if err != nil {
		base.Close()
		return out, err
	}
	out.Lost += lost
	out.BaselinePerSec = float64(got.Load()) * float64(pool.per) / time.Since(t0).Seconds()
	base.Close()
	out.SlowConsumers = e.slowConsumers() - slow0

	// The pipeline, on the same messages.
	err = e.directPipeline(ctx, e.cfg, pool, slot, &out)
	return out, err
}

// directPipeline runs the pipeline with the settings of cfg on the pool's
// messages for one slot and fills out's pipeline figures.
func (e *benchEnv) directPipeline(ctx context.Context, cfg *configs.Config, pool *benchPool, slot time.Duration, out *benchThroughput) error {
	out.Commit = commitString(cfg)
	slow0 := e.slowConsumers()
	defer func() { out.SlowConsumers += e.slowConsumers() - slow0 }()
	pub, err := e.connect()
	if err != nil {
		return err
	}
	defer pub.Close()
	dir := filepath.Join(e.dir, fmt.Sprintf("direct-%d-%d", pool.per, cfg.Store.CommitReadings))
	defer os.RemoveAll(dir)
	p, err := e.startPipeline(ctx, cfg, filepath.Join(dir, dbFile), ingest.ModeDirect, pool.prefix, "", nil)
	if err != nil {
		return err
	}
	defer p.stop()
	if err := p.waitLive(ctx, pub, pool.prefix+".bench-probe"); err != nil {
		return err
	}
	if err := p.warmUp(ctx, pub, pool); err != nil {
		return err
	}
	// Untimed traffic first: the first commits of a fresh file and the
	// heap growing to its working size made the first pipeline of a run
	// up to twice as slow as a second one with the same settings, which
	// is start-up, not the steady state measured here.
	s0 := p.svc.Stats().Messages
	if _, _, err := pool.publish(ctx, pub, time.Now().Add(slot/2), func() uint64 { return p.svc.Stats().Messages - s0 }); err != nil {
		return err
	}
	start := p.svc.Stats()
	io0 := diskWritten()
	var c0 commitTotals
	c0.n, c0.bytes, c0.secs = p.commitStats()
	taken := func() uint64 { return p.svc.Stats().Messages - start.Messages }
	t0 := time.Now()
	_, lost, err := pool.publish(ctx, pub, t0.Add(slot), taken)
	if err != nil {
		return err
	}
	out.Lost += lost
	end := p.svc.Stats()
	tEnd := time.Now()
	tCommit, err := p.committed(ctx, end.Applied)
	if err != nil {
		return err
	}
	out.fill(p, end.Applied-start.Applied, t0, tEnd, tCommit, io0, c0)
	return p.stop()
}

// commitConfig returns the configuration serve would read from a file
// that sets only the commit interval and readings, on the bench's bus
// and directory.
func (e *benchEnv) commitConfig(interval time.Duration, readings int) (*configs.Config, error) {
	src := fmt.Sprintf("store: {commit_interval: %s, commit_readings: %d}\n", configs.FormatDuration(interval), readings)
	cfg, err := configs.Parse("(bench commit settings)", []byte(src))
	if err != nil {
		return nil, err
	}
	cfg.Store.Dir, cfg.Bus.Servers = e.dir, e.cfg.Bus.Servers
	return cfg, nil
}

// commitString describes the commit settings of cfg.
func commitString(cfg *configs.Config) string {
	return fmt.Sprintf("every %s or %s readings", configs.FormatDuration(cfg.Store.CommitInterval), grouped(float64(cfg.Store.CommitReadings)))
}

// commitTotals are the pipeline's commit count, bytes put and seconds
// spent when timing began, so untimed traffic before it is left out.
type commitTotals struct {
	n           int
	bytes, secs float64
}

// fill computes the pipeline's rates: applied over the publishing time,
// committed over the time until the file held them; commits are counted
// from c0.
func (t *benchThroughput) fill(p *benchPipeline, applied uint64, t0, tEnd, tCommit time.Time, io0 int64, c0 commitTotals) {
	t.Readings = applied
	t.Seconds = tEnd.Sub(t0).Seconds()
	t.AppliedPerSec = float64(applied) / t.Seconds
	t.CommittedPerSec = float64(applied) / tCommit.Sub(t0).Seconds()
	t.Ratio = t.AppliedPerSec / t.BaselinePerSec
	n, bytes, secs := p.commitStats()
	n, bytes, secs = n-c0.n, bytes-c0.bytes, secs-c0.secs
	t.Commits = n
	if n > 0 {
		t.BytesPerCommit = bytes / float64(n)
		t.CommitMs = secs / float64(n) * 1000
	}
	t.BytesPerSec = bytes / tCommit.Sub(t0).Seconds()
	t.DiskPerSec = -1
	if io1 := diskWritten(); io0 >= 0 && io1 >= 0 {
		t.DiskPerSec = float64(io1-io0) / tCommit.Sub(t0).Seconds()
	}
}

// streamCase fills a stream for one slot, then drains it with an ack-only
// consumer and with the pipeline, each for at most one slot. The first
// third of the stream (at least one message of every sensor, when the
// fill allows) is a warm-up for both and is not timed: it holds the
// pipeline's start, the allocation of every sensor's windows and the
// first commits of a fresh file, none of which is the steady state.
func (e *benchEnv) streamCase(ctx context.Context, pool *benchPool, slot time.Duration) (benchThroughput, error) {
	out := benchThroughput{Case: fmt.Sprintf("stream %d/msg", pool.per), Mode: "stream", PerMessage: pool.per, Baseline: "ack", Commit: commitString(e.cfg)}
	streamName := "DRIFTFIT_BENCH_" + strings.ToUpper(e.tag)
	js, err := jetstream.New(e.bus.Conn)
	if err != nil {
		return out, err
	}
	stream, err := js.CreateStream(ctx, jetstream.StreamConfig{Name: streamName, Subjects: []string{pool.prefix + ".>"}, Storage: jetstream.FileStorage})
	if err != nil {
		return out, fmt.Errorf("bench: create stream: %w", err)
	}
	defer func() { _ = js.DeleteStream(context.WithoutCancel(ctx), streamName) }()

	pub, err := e.connect()
	if err != nil {
		return out, err
	}
	defer pub.Close()
	// Fill with acknowledged publishes, so the stream holds every message
	// sent; at most 256 MiB of it.
	pjs, err := jetstream.New(pub, jetstream.WithPublishAsyncMaxPending(4096))
	if err != nil {
		return out, err
	}
	var sent uint64
	maxMsgs := uint64(max(1, (256<<20)/(pool.bytes/len(pool.data)+1)))
	t0 := time.Now()
	for i := 0; (time.Since(t0) < slot || sent < uint64(len(pool.data))) && ctx.Err() == nil && sent < maxMsgs; i++ {
		k := i % len(pool.data)
		_, err := pjs.PublishAsync(pool.subjects[k], pool.data[k])
		if errors.Is(err, jetstream.ErrTooManyStalledMsgs) {
			// The acknowledgements lag (a busy machine): let them catch
			// up, then send the message again.
			select {
			case <-pjs.PublishAsyncComplete():
			case <-time.After(time.Minute):
				return out, errors.New("bench: stream acknowledgements stalled for a minute")
			}
			i--
			continue
		}
		if err != nil {
			return out, err
		}
		sent++
	}
	select {
	case <-pjs.PublishAsyncComplete():
	case <-time.After(time.Minute):
		return out, errors.New("bench: stream did not acknowledge the fill within a minute")
	}
	if !waitUntil(ctx, time.Minute, func() bool {
		info, err := stream.Info(ctx)
		return err == nil && info.State.Msgs >= sent
	}) {
		return out, fmt.Errorf("bench: stream did not store %d messages within a minute", sent)
	}
	warm := max(min(uint64(len(pool.data)), sent/2), sent/3)

	// Baseline: a durable pull consumer that acknowledges each message.
	cons, err := js.CreateConsumer(ctx, streamName, jetstream.ConsumerConfig{
		Durable: "bench-ack", AckPolicy: jetstream.AckExplicitPolicy, AckWait: time.Minute,
		MaxAckPending: 1 << 16, DeliverPolicy: jetstream.DeliverAllPolicy,
	})
	if err != nil {
		return out, err
	}
	var got atomic.Uint64
	var tWarm atomic.Int64
	cc, err := cons.Consume(func(m jetstream.Msg) {
		_ = m.Ack()
		if got.Add(1) == warm {
			tWarm.Store(time.Now().UnixNano())
		}
	}, jetstream.PullMaxMessages(2048))
	if err != nil {
		return out, err
	}
	if !waitUntil(ctx, time.Minute, func() bool { return got.Load() >= warm }) {
		return out, fmt.Errorf("bench: the ack-only consumer did not take the %d warm-up messages within a minute", warm)
	}
	waitUntil(ctx, slot, func() bool { return got.Load() >= sent })
	if n := got.Load(); n > warm {
		out.BaselinePerSec = float64(n-warm) * float64(pool.per) / time.Since(time.Unix(0, tWarm.Load())).Seconds()
	}
	cc.Stop()
	<-cc.Closed()
	_ = js.DeleteConsumer(ctx, streamName, "bench-ack")

	// The pipeline on the same stream, from its first message.
	p, err := e.startPipeline(ctx, e.cfg, filepath.Join(e.dir, "stream", dbFile), ingest.ModeStream, pool.prefix, streamName, nil)
	if err != nil {
		return out, err
	}
	defer p.stop()
	if !waitUntil(ctx, time.Minute, func() bool { return p.svc.Stats().Applied >= warm*uint64(pool.per) }) {
		return out, fmt.Errorf("bench: stream warm-up of %d messages not applied within a minute", warm)
	}
	start := p.svc.Stats()
	io0 := diskWritten()
	var c0 commitTotals
	c0.n, c0.bytes, c0.secs = p.commitStats()
	t0 = time.Now()
	// Done when every message of the stream has been applied or refused:
	// a count from the start taken above would overshoot by whatever the
	// pipeline applied while the warm-up wait polled, and then the phase
	// would always run out its slot and report the slot's length.
	want := sent * uint64(pool.per)
	waitUntil(ctx, slot, func() bool { st := p.svc.Stats(); return st.Applied+st.Rejected >= want })
	end := p.svc.Stats()
	tEnd := time.Now()
	tCommit, err := p.committed(ctx, end.Applied)
	if err != nil {
		return out, err
	}
	out.fill(p, end.Applied-start.Applied, t0, tEnd, tCommit, io0, c0)
	return out, p.stop()
}

// latency offers readings at a steady rate in direct mode, with one probe
// reading a millisecond stamped with its publish time, and times each
// probe until its worker has folded it into the windows.
func (e *benchEnv) latency(ctx context.Context, pool *benchPool, offered float64, slot time.Duration) (benchLatency, error) {
	out := benchLatency{Mode: "direct 1/msg"}
	probe := pool.prefix + ".bench-probe"
	probeID := "bench-probe"
	var mu sync.Mutex
	var lat []time.Duration
	var from atomic.Int64 // probes stamped before are the ones of waitLive
	from.Store(math.MaxInt64)
	onApplied := func(id string, rs []rolling.Reading) {
		if id != probeID {
			return
		}
		now := time.Now().UnixNano()
		mu.Lock()
		for _, r := range rs {
			if r.UnixNano >= from.Load() {
				lat = append(lat, time.Duration(now-r.UnixNano))
			}
		}
		mu.Unlock()
	}
	pub, err := e.connect()
	if err != nil {
		return out, err
	}
	defer pub.Close()
	p, err := e.startPipeline(ctx, e.cfg, filepath.Join(e.dir, "latency", dbFile), ingest.ModeDirect, pool.prefix, "", onApplied)
	if err != nil {
		return out, err
	}
	defer p.stop()
	if err := p.waitLive(ctx, pub, probe); err != nil {
		return out, err
	}

	perTick := int(offered / 1000)
	tick := time.NewTicker(time.Millisecond)
	defer tick.Stop()
	var buf []byte
	k, probes := 0, 0
	t0 := time.Now()
	from.Store(t0.UnixNano())
	for time.Since(t0) < slot && ctx.Err() == nil {
		<-tick.C
		for range perTick {
			if err := pub.Publish(pool.subjects[k], pool.data[k]); err != nil {
				return out, err
			}
			k = (k + 1) % len(pool.data)
		}
		buf = ingest.AppendReading(buf[:0], ingest.Decoded{Reading: rolling.Reading{UnixNano: time.Now().UnixNano(), Value: 1}})
		if err := pub.Publish(probe, buf); err != nil {
			return out, err
		}
		probes++
	}
	if err := pub.Flush(); err != nil {
		return out, err
	}
	out.OfferedPerSec = float64(perTick) * 1000
	waitUntil(ctx, 10*time.Second, func() bool {
		mu.Lock()
		defer mu.Unlock()
		return len(lat) >= probes
	})
	mu.Lock()
	out.Samples = len(lat)
	out.P50Ms, out.P99Ms, out.MaxMs = quantilesMs(lat)
	mu.Unlock()
	return out, p.stop()
}

// The alert phase. Each probe is a sensor of a class that judges the
// slope of a line over a window of 1-second panes, with debounce 1 (off)
// and min_readings 32: the gates judge a window only once its readings
// can estimate their own serial correlation (rolling.MinPairs pairs). A
// probe publishes a reading every benchAlertGap, stamped with the
// wall-clock time of publishing, on a ramp 50 times as steep as the
// limit, so any 32 of its readings put the fit over the limit: its 32nd
// reading is the crossing one, and the alert must be raised at the first
// pane close after it. Probes start one every benchAlertGap, so the crossings fall
// evenly over the pane; each holds its first reading after a pane
// boundary for probeHold, and stops once its raised event is on the bus.
const (
	benchAlertPane = time.Second
	benchAlertGap  = 10 * time.Millisecond
	benchAlertRate = 50.0 // kPa/s, against a limit of 1 kPa/s
	benchAlertWait = 10 * time.Second
	benchAlertMin  = rolling.MinPairs + 2 // min_readings; the crossing reading is this one
)

// probeNoise is the probes' repeating noise pattern (see the publisher).
var probeNoise = [3]float64{1, 1, -2}

// benchAlertClass is the probes' class; %[1]s is the probe id prefix,
// %[2]s the pane.
const benchAlertClass = `classes:
  - name: ramp-probe
    match: ["%[1]s.ramp-*"]
    unit: kPa
    span: {lower: 0, upper: 1000}
    tolerance: "5 kPa"
    windows:
      - {span: 2m, pane: %[2]s}
    min_readings: %[3]d
    min_coverage: 0
    debounce: 1
    # The probes measure how fast a decision goes out, not the evidence
    # behind it: a 1 s pane is judged 31.6 million times a year, and the
    # default budget would ask for far more than four readings.
    alarm_budget: {false_tickets_per_year: 1000000}
    limits:
      slope: "1 kPa/s"
`

// benchAlertNote says what the alert latency is, for the output.
const benchAlertNote = "alert latency: probe sensors of a class judged on the slope of a 2m window of 1s panes (debounce 1, min_readings 32, the least whose readings estimate their own serial correlation) publish a reading every 10 ms, stamped with the publish time, on a ramp 50 times the limit; the 32nd reading crosses the limit and the alert is raised at the next pane close, which the probe's first reading in the next pane triggers; probes hold that reading 0-240 ms after the boundary, spread evenly, as sensors of different cadences would. close→alert runs from publishing that reading to receiving the raised event on <alert prefix>.<sensor>; cross→alert from publishing the crossing reading, so it also includes the wait for the pane to end (at most the evaluation interval) and the hold. A decision is committed with the state of its sensor (a commit of the sensors with a decision waiting), then published from the outbox; the service runs as serve runs it, with no load besides the probes (idle) and with the publish-to-fit phase's offered load"

// alertProbe is one probe sensor of the alert phase.
type alertProbe struct {
	id      string
	subject string
	start   time.Time
	stamps  []int64      // times of the readings published, Unix ns; publisher only
	last    atomic.Int64 // newest reading time of the raised event's fit, Unix ns
	recv    atomic.Int64 // when the raised event was received, Unix ns; 0 before
}

// alertLatency runs the probes on a service configured with their class,
// first with no other traffic, then beside the pool's messages at offered
// readings a second; probes start over the given time in each.
func (e *benchEnv) alertLatency(ctx context.Context, pool *benchPool, offered float64, starts time.Duration) ([]benchAlert, error) {
	idPrefix := "bench-" + e.tag
	cfg, err := configs.Parse("(bench alert class)", fmt.Appendf(nil, benchAlertClass, idPrefix, configs.FormatDuration(benchAlertPane), benchAlertMin))
	if err != nil {
		return nil, err
	}
	cfg.Store.Dir, cfg.Bus.Servers = e.dir, e.cfg.Bus.Servers
	pub, err := e.connect()
	if err != nil {
		return nil, err
	}
	defer pub.Close()
	probeConn, err := e.connect()
	if err != nil {
		return nil, err
	}
	defer probeConn.Close()
	dir := filepath.Join(e.dir, "alerts")
	defer os.RemoveAll(dir)
	p, err := e.startPipeline(ctx, cfg, filepath.Join(dir, dbFile), ingest.ModeDirect, pool.prefix, "", nil)
	if err != nil {
		return nil, err
	}
	defer p.stop()
	if err := p.waitLive(ctx, pub, pool.prefix+".bench-probe"); err != nil {
		return nil, err
	}
	if err := p.warmUp(ctx, pub, pool); err != nil {
		return nil, err
	}

	// The receiver of alerts, on its own connection as any consumer.
	rcv, err := e.connect()
	if err != nil {
		return nil, err
	}
	defer rcv.Close()
	var mu sync.Mutex
	probes := map[string]*alertProbe{}
	sub, err := rcv.Subscribe(cfg.Bus.AlertSubjectPrefix+".>", func(m *nats.Msg) {
		now := time.Now().UnixNano()
		var ev alert.Event
		if json.Unmarshal(m.Data, &ev) != nil || ev.Type != alert.Raised {
			return
		}
		mu.Lock()
		pr := probes[ev.Sensor]
		mu.Unlock()
		if pr != nil && pr.recv.Load() == 0 {
			pr.last.Store(ev.Last.UnixNano())
			pr.recv.Store(now)
		}
	})
	if err == nil {
		err = rcv.Flush()
	}
	if err != nil {
		return nil, err
	}
	defer sub.Unsubscribe()

	var out []benchAlert
	rng := rand.New(rand.NewPCG(13, 13))
	for _, run := range []struct {
		name, tag string
		offered   float64
	}{{"idle", "i", 0}, {"loaded", "l", offered}} {
		n := int(starts / benchAlertGap)
		batch := make([]*alertProbe, n)
		mu.Lock()
		for i := range batch {
			id := fmt.Sprintf("%s.ramp-%s%d", idPrefix, run.tag, i)
			batch[i] = &alertProbe{id: id, subject: pool.prefix + "." + id}
			probes[id] = batch[i]
		}
		mu.Unlock()
		a := benchAlert{Load: run.name, Interval: configs.FormatDuration(benchAlertPane), Probes: n}
		if run.offered > 0 {
			a.Load = fmt.Sprintf("direct 1/msg at %s readings/s", grouped(run.offered))
		}
		stop := make(chan struct{})
		var wg sync.WaitGroup
		var loadErr error
		if run.offered > 0 {
			a.OfferedPerSec = float64(int(run.offered/1000)) * 1000
			wg.Go(func() { loadErr = pool.steady(pub, int(run.offered/1000), stop) })
		}
		err := runProbes(ctx, probeConn, batch, rng)
		close(stop)
		wg.Wait()
		if err = errors.Join(err, loadErr); err != nil {
			return nil, err
		}
		a.fill(batch)
		out = append(out, a)
	}
	return out, p.stop()
}

// runProbes starts a probe every benchAlertGap and publishes a reading of
// every started probe whose alert has not come every benchAlertGap, until
// all alerts came or benchAlertWait after the last start.
func runProbes(ctx context.Context, nc *nats.Conn, probes []*alertProbe, rng *rand.Rand) error {
	if len(probes) == 0 {
		return nil
	}
	tick := time.NewTicker(benchAlertGap)
	defer tick.Stop()
	var buf []byte
	started := 0
	var deadline time.Time
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-tick.C:
		}
		if started < len(probes) {
			probes[started].start = time.Now()
			started++
			if started == len(probes) {
				deadline = time.Now().Add(benchAlertWait)
			}
		}
		waiting := 0
		for i, pr := range probes[:started] {
			if pr.recv.Load() != 0 {
				continue
			}
			waiting++
			now := time.Now()
			if begin := now.Truncate(benchAlertPane); len(pr.stamps) > 0 && pr.stamps[len(pr.stamps)-1] < begin.UnixNano() &&
				now.Before(begin.Add(probeHold(i))) {
				continue // the reading that closes the pane comes later
			}
			// A repeating +1, +1, −2 (×0.005 kPa) keeps the residuals
			// of the fit from being exactly zero; its lag-1 correlation
			// is −0.5 (−3/6 over a period), which the serial correction
			// takes as none, so every reading counts as an effective one
			// and the 32nd crosses, whatever the timing.
			v := 100 + benchAlertRate*now.Sub(pr.start).Seconds() + 0.005*probeNoise[len(pr.stamps)%3]
			buf = ingest.AppendReading(buf[:0], ingest.Decoded{Reading: rolling.Reading{UnixNano: now.UnixNano(), Value: v}})
			if err := nc.Publish(pr.subject, buf); err != nil {
				return err
			}
			pr.stamps = append(pr.stamps, now.UnixNano())
		}
		if !deadline.IsZero() && (waiting == 0 || time.Now().After(deadline)) {
			return nc.Flush()
		}
	}
}

// probeHold is how long probe i stays silent after a pane boundary: 0 to
// 240 ms in steps of 10 ms. It spreads the readings that close panes, as
// the readings of sensors with different cadences are spread, so they do
// not all reach the alerter within 10 ms of the boundary.
func probeHold(i int) time.Duration { return time.Duration(i%25) * benchAlertGap }

// steady publishes the pool's messages at perMs a millisecond until stop
// is closed.
func (p *benchPool) steady(nc *nats.Conn, perMs int, stop <-chan struct{}) error {
	tick := time.NewTicker(time.Millisecond)
	defer tick.Stop()
	for k := 0; ; {
		select {
		case <-stop:
			return nc.Flush()
		case <-tick.C:
		}
		for range perMs {
			if err := nc.Publish(p.subjects[k], p.data[k]); err != nil {
				return err
			}
			k = (k + 1) % len(p.data)
		}
	}
}

// fill computes the latencies of the probes whose alert came.
func (a *benchAlert) fill(probes []*alertProbe) {
	var toClose, toCross []time.Duration
	for _, pr := range probes {
		recv := pr.recv.Load()
		if recv == 0 {
			continue
		}
		a.Raised++
		c, x, off, ok := probeLatency(pr.stamps, benchAlertMin-1, pr.last.Load(), recv, benchAlertPane)
		if !ok {
			a.OffPane++
			continue
		}
		if off {
			a.OffPane++
		}
		toClose, toCross = append(toClose, c), append(toCross, x)
	}
	a.CloseP50Ms, a.CloseP99Ms, a.CloseMaxMs = quantilesMs(toClose)
	a.CrossP50Ms, a.CrossP99Ms, a.CrossMaxMs = quantilesMs(toCross)
}

// probeLatency returns the times from the reading that closed the pane a
// raised event judged, and from the crossing reading stamps[cross], to
// the event's receipt at recv. stamps are a probe's reading times in
// order (Unix ns), last the newest reading time of the judged fit. Panes
// are aligned to the Unix epoch, so the judged pane is [last - last mod
// pane, +pane), and the closing reading is the first at or after its end.
// off reports that the crossing reading lies in an earlier pane (the
// alert came a pane close late); ok is false when the judged pane ended
// before the crossing reading or no reading closed it, which a probe
// working as designed never shows.
func probeLatency(stamps []int64, cross int, last, recv int64, pane time.Duration) (fromClose, fromCross time.Duration, off, ok bool) {
	if cross < 0 || cross >= len(stamps) || last <= 0 {
		return 0, 0, false, false
	}
	begin := last - last%int64(pane)
	end := begin + int64(pane)
	i, _ := slices.BinarySearch(stamps, end)
	if i == len(stamps) || stamps[cross] >= end {
		return 0, 0, false, false
	}
	return time.Duration(recv - stamps[i]), time.Duration(recv - stamps[cross]), stamps[cross] < begin, true
}

// quantilesMs returns the median, the 99th percentile and the maximum of
// ds in milliseconds, each the sample at rank ⌊q·(n-1)⌋ of the sorted
// samples (no interpolation); zeros for no samples.
func quantilesMs(ds []time.Duration) (p50, p99, maxMs float64) {
	if len(ds) == 0 {
		return 0, 0, 0
	}
	s := slices.Clone(ds)
	slices.Sort(s)
	q := func(f float64) float64 { return float64(s[int(f*float64(len(s)-1))].Nanoseconds()) / 1e6 }
	return q(0.5), q(0.99), q(1)
}

// fleetCase builds a state file holding the sensors with full windows,
// restarts a service on it, measures time and memory, then commits a
// reading for a fixed count of sensors a few times.
func (e *benchEnv) fleetCase(ctx context.Context, sensors []demo.Sensor) (benchFleet, error) {
	out := benchFleet{Sensors: len(sensors)}
	prefix := "bench" + e.tag + ".f"
	path := filepath.Join(e.dir, "fleet-"+strconv.Itoa(len(sensors)), dbFile)
	defer os.RemoveAll(filepath.Dir(path))
	panes, err := e.buildFleet(path, sensors)
	if err != nil {
		return out, err
	}
	out.PanesPerSensor = float64(panes) / float64(len(sensors))
	if fi, err := os.Stat(path); err == nil {
		out.FileBytes = fi.Size()
	}

	heap0, rss0 := memNow()
	t0 := time.Now()
	p, err := e.startPipeline(ctx, e.cfg, path, ingest.ModeDirect, prefix, "", nil)
	if err != nil {
		return out, err
	}
	defer p.stop()
	n := int64(len(sensors))
	if !waitUntil(ctx, 5*time.Minute, func() bool { return int64(p.svc.Stats().Sensors) >= n }) {
		return out, fmt.Errorf("bench: %d sensors not restored within 5 minutes", n)
	}
	out.RestoreMs = float64(time.Since(t0).Microseconds()) / 1000
	out.OpenMs = float64(p.opened.Microseconds()) / 1000
	heap1, rss1 := memNow()
	out.HeapPerSensor = float64(heap1-heap0) / float64(n)
	out.RSSPerSensor = float64(rss1-rss0) / float64(n)

	pub, err := e.connect()
	if err != nil {
		return out, err
	}
	defer pub.Close()
	if err := p.waitLive(ctx, pub, prefix+"."+sensors[0].ID); err != nil {
		return out, err
	}
	if _, err := p.committed(ctx, p.svc.Stats().Applied); err != nil {
		return out, err
	}
	out.Changed = min(benchChanged, len(sensors))
	stride := len(sensors) / out.Changed
	c0, b0, s0 := p.commitStats()
	io0 := diskWritten()
	var buf []byte
	const rounds = 5
	for range rounds {
		before := p.svc.Stats().Applied
		at := time.Now().Add(-time.Second).UnixNano()
		for i := range out.Changed {
			buf = ingest.AppendReading(buf[:0], ingest.Decoded{Reading: rolling.Reading{UnixNano: at, Value: sensors[i*stride].Level}})
			if err := pub.Publish(prefix+"."+sensors[i*stride].ID, buf); err != nil {
				return out, err
			}
		}
		if err := pub.Flush(); err != nil {
			return out, err
		}
		want := before + uint64(out.Changed)
		if !waitUntil(ctx, time.Minute, func() bool { return p.svc.Stats().Applied >= want }) {
			return out, fmt.Errorf("bench: fleet readings not applied within a minute")
		}
		if _, err := p.committed(ctx, want); err != nil {
			return out, err
		}
	}
	c1, b1, s1 := p.commitStats()
	out.Commits = c1 - c0
	if out.Commits > 0 {
		out.BytesPerCommit = (b1 - b0) / float64(out.Commits)
		out.CommitMs = (s1 - s0) / float64(out.Commits) * 1000
		if io1 := diskWritten(); io0 >= 0 && io1 >= 0 {
			out.DiskPerCommit = float64(io1-io0) / float64(out.Commits)
		} else {
			out.DiskPerCommit = -1
		}
	}
	return out, p.stop()
}

// buildFleet writes the sensors' state with one reading in every pane of
// every window (the newest 24 hours hourly, the 30 days before daily),
// in key order, without fsync: building is not what is measured.
func (e *benchEnv) buildFleet(path string, sensors []demo.Sensor) (panes int, err error) {
	if err := os.MkdirAll(filepath.Dir(path), 0o700); err != nil {
		return 0, err
	}
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		return 0, err
	}
	defer func() { err = errors.Join(err, db.Close()) }()
	ids := make([]int, len(sensors))
	for i := range ids {
		ids[i] = i
	}
	slices.SortFunc(ids, func(a, b int) int { return strings.Compare(sensors[a].ID, sensors[b].ID) })
	rng := rand.New(rand.NewPCG(11, 11))
	now := time.Now().Add(-time.Minute)
	var times []time.Time
	for d := 30; d >= 1; d-- {
		times = append(times, now.Add(-time.Duration(d)*24*time.Hour))
	}
	for h := 23; h >= 0; h-- {
		times = append(times, now.Add(-time.Duration(h)*time.Hour))
	}
	var batch store.Batch
	for j, i := range ids {
		s, err := rolling.NewSensor(e.specs...)
		if err != nil {
			return 0, err
		}
		for _, at := range times {
			d := float64(at.Unix()%(30*86400)) / 86400
			if err := s.Add(rolling.Reading{UnixNano: at.UnixNano(), Value: sensors[i].Value(d, rng)}); err != nil {
				return 0, fmt.Errorf("bench: fill sensor %s: %w", sensors[i].ID, err)
			}
		}
		s.Changed(func(rolling.PaneKey) { panes++ })
		if err := batch.Sensor(sensors[i].ID, s); err != nil {
			return 0, err
		}
		if j%2000 == 1999 || j == len(ids)-1 {
			if _, err := db.Commit(&batch); err != nil {
				return 0, err
			}
		}
	}
	return panes, nil
}

// memNow returns the heap in use and the anonymous resident memory after
// a collection.
func memNow() (heap, rss int64) {
	runtime.GC()
	debug.FreeOSMemory() // a GC that also returns free pages, so RSS tracks what is live
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	return int64(ms.HeapInuse), procStatusKB("RssAnon:") * 1024
}

// procStatusKB reads a "kB" field of /proc/self/status; 0 if absent.
func procStatusKB(field string) int64 {
	data, err := os.ReadFile("/proc/self/status")
	if err != nil {
		return 0
	}
	for line := range strings.Lines(string(data)) {
		if rest, ok := strings.CutPrefix(line, field); ok {
			n, _ := strconv.ParseInt(strings.TrimSuffix(strings.TrimSpace(rest), " kB"), 10, 64)
			return n
		}
	}
	return 0
}

// diskWritten returns the bytes this process caused to be written to
// storage (write_bytes of /proc/self/io), or -1 where that is unknown.
func diskWritten() int64 {
	data, err := os.ReadFile("/proc/self/io")
	if err != nil {
		return -1
	}
	for line := range strings.Lines(string(data)) {
		if rest, ok := strings.CutPrefix(line, "write_bytes:"); ok {
			n, err := strconv.ParseInt(strings.TrimSpace(rest), 10, 64)
			if err != nil {
				return -1
			}
			return n
		}
	}
	return -1
}

// cpuModel returns the first "model name" of /proc/cpuinfo, or "".
func cpuModel() string {
	f, err := os.Open("/proc/cpuinfo")
	if err != nil {
		return ""
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		if k, v, ok := strings.Cut(sc.Text(), ":"); ok && strings.TrimSpace(k) == "model name" {
			return strings.TrimSpace(v)
		}
	}
	return ""
}

// waitUntil polls cond every millisecond until it holds (true), the
// timeout passes or ctx ends (false).
func waitUntil(ctx context.Context, timeout time.Duration, cond func() bool) bool {
	deadline := time.Now().Add(timeout)
	for !cond() {
		if ctx.Err() != nil || time.Now().After(deadline) {
			return false
		}
		time.Sleep(time.Millisecond)
	}
	return true
}

func specsString(specs []rolling.WindowSpec) string {
	parts := make([]string, len(specs))
	for i, s := range specs {
		parts[i] = configs.FormatDuration(s.Span) + "/" + configs.FormatDuration(s.Pane)
	}
	return strings.Join(parts, ", ")
}

// Print writes the report for people: tables of the phases, then the
// notes on what each measured.
func (r *Report) Print(w io.Writer) {
	fmt.Fprintf(w, "driftfit bench  %s  %d CPUs (%s)  %s\n", r.Date, r.CPUs, r.CPUModel, r.Go)
	fmt.Fprintf(w, "bus: %s; %d sensors; windows %s; %s in all for throughput and latency\n\n", r.Bus, r.Sensors, r.Windows, r.Duration)
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "case\tapplied/s\tcommitted/s\tbaseline/s\tratio\tbaseline\tcommits\tbytes/commit\tbytes/s\tcommit ms\tdisk bytes/s\tlost\t")
	for _, t := range r.Throughput {
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%.2f\t%s\t%d\t%s\t%s\t%.1f\t%s\t%d\t\n", t.Case, grouped(t.AppliedPerSec), grouped(t.CommittedPerSec),
			grouped(t.BaselinePerSec), t.Ratio, t.Baseline, t.Commits, grouped(t.BytesPerCommit), grouped(t.BytesPerSec), t.CommitMs, grouped(t.DiskPerSec), t.Lost)
	}
	tw.Flush()
	for _, t := range r.Throughput {
		fmt.Fprintf(w, "%s: commits %s\n", t.Case, t.Commit)
	}
	l := r.Latency
	fmt.Fprintf(w, "\nlatency, publish to fit updated (%s, %s readings/s offered, %d probes): p50 %.2f ms, p99 %.2f ms, max %.2f ms\n",
		l.Mode, grouped(l.OfferedPerSec), l.Samples, l.P50Ms, l.P99Ms, l.MaxMs)
	for _, a := range r.Alerts {
		fmt.Fprintf(w, "latency, alert on the bus, %s sensors, evaluation interval %s (%s; %d probes, %d raised, %d judged off pane):\n",
			grouped(float64(a.Sensors)), a.Interval, a.Load, a.Probes, a.Raised, a.OffPane)
		fmt.Fprintf(w, "  from the reading that closed the pane: p50 %.1f ms, p99 %.1f ms, max %.1f ms\n", a.CloseP50Ms, a.CloseP99Ms, a.CloseMaxMs)
		fmt.Fprintf(w, "  from the reading that crossed the limit: p50 %.1f ms, p99 %.1f ms, max %.1f ms\n", a.CrossP50Ms, a.CrossP99Ms, a.CrossMaxMs)
	}
	if len(r.Fleets) > 0 {
		fmt.Fprintln(w)
		tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "sensors\tpanes each\tfile MB\topen ms\trestore ms\theap/sensor\tRSS/sensor\tchanged/commit\tbytes/commit\tcommit ms\tdisk bytes/commit\t")
		for _, f := range r.Fleets {
			fmt.Fprintf(tw, "%s\t%.0f\t%.0f\t%.1f\t%.0f\t%s\t%s\t%d\t%s\t%.1f\t%s\t\n", grouped(float64(f.Sensors)), f.PanesPerSensor, float64(f.FileBytes)/1e6,
				f.OpenMs, f.RestoreMs, grouped(f.HeapPerSensor), grouped(f.RSSPerSensor), f.Changed, grouped(f.BytesPerCommit), f.CommitMs, grouped(f.DiskPerCommit))
		}
		tw.Flush()
	}
	fmt.Fprintln(w)
	for _, n := range r.Notes {
		fmt.Fprintf(w, "- %s\n", n)
	}
}

// grouped formats v rounded to a whole number with thousands separators.
func grouped(v float64) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return fmt.Sprint(v)
	}
	s := strconv.FormatInt(int64(math.Round(v)), 10)
	neg := strings.HasPrefix(s, "-")
	s = strings.TrimPrefix(s, "-")
	var b bytes.Buffer
	for i, c := range s {
		if i > 0 && (len(s)-i)%3 == 0 {
			b.WriteByte(',')
		}
		b.WriteRune(c)
	}
	if neg {
		return "-" + b.String()
	}
	return b.String()
}
