package main

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/http/pprof"
	"os"
	"os/signal"
	"path/filepath"
	"syscall"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"github.com/rs/zerolog"

	"driftfit/alert"
	demoplant "driftfit/cmd/driftfit/internal/demo"
	"driftfit/cmd/driftfit/internal/web"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/ingest/readapi"
	"driftfit/rolling"
	"driftfit/store"
)

// dbFile is the name of the state file in the data directory.
const dbFile = "driftfit.db"

// demoConfig is the configuration --demo uses when --config is not given.
const demoConfig = "configs/demo.yaml"

func runServe(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) error {
	fs := newFlags("serve", serveHelp)
	cfgPath := fs.String("config", "", "configuration `FILE` (YAML); --demo defaults it to "+demoConfig)
	demo := fs.Bool("demo", false, "also publish the invented demo plant's readings, 30 days compressed into about a minute, then live")
	dataDir := fs.String("data", "", "data directory (overrides store.dir)")
	httpAddr := fs.String("http-addr", "", "listen address of /metrics (overrides http.addr; \"off\" disables)")
	pprofAddr := fs.String("pprof-addr", "", "serve net/http/pprof on this loopback address (off unless given)")
	natsPort := fs.Int("nats-port", 4222, "port of the embedded NATS server on 127.0.0.1 (-1: any free port)")
	logFormat := fs.String("log-format", "json", "log format: json or console")
	logLevel := fs.String("log-level", "info", "log level: debug, info, warn, error")
	stopTimeout := fs.Duration("stop-timeout", 10*time.Second, "bound of each step of the shutdown (bus drain, publishing the last alerts, listeners)")
	resetPosition := fs.Bool("reset-position", false, "read the readings stream from its start, as after the stream was deleted or rebuilt (serve refuses to start on such a stream without it); the sensors' state is kept and repeats are refused as duplicates")
	if pos, err := fs.parse(args); err != nil || len(pos) != 0 {
		return cmp.Or(err, usageError("unexpected arguments %q", pos))
	}
	if *cfgPath == "" && *demo {
		*cfgPath = demoConfig
	}
	var cfg *configs.Config
	var err error
	if *cfgPath == "" {
		cfg, err = configs.Parse("(defaults)", []byte("{}"))
	} else {
		cfg, err = configs.Load(*cfgPath)
	}
	if err != nil {
		return err
	}
	if *dataDir != "" {
		cfg.Store.Dir = *dataDir
	}
	if *httpAddr != "" {
		cfg.HTTP.Addr = *httpAddr
	}
	log, err := newLogger(stderr, *logFormat, *logLevel)
	if err != nil {
		return usageError("%v", err)
	}

	if *stopTimeout <= 0 {
		return usageError("--stop-timeout %v: must be > 0", *stopTimeout)
	}

	// A second signal exits at once, whatever shutdown is doing.
	returned := make(chan struct{})
	defer close(returned)
	go func() {
		select {
		case <-ctx.Done():
		case <-returned:
			return
		}
		sig := make(chan os.Signal, 1)
		signal.Notify(sig, os.Interrupt, syscall.SIGTERM)
		defer signal.Stop(sig)
		select {
		case <-sig:
			log.Warn().Msg("second signal: exiting now")
			os.Exit(130)
		case <-returned:
		}
	}()

	if err := privateDir(cfg.Store.Dir, log); err != nil {
		return err
	}
	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	metrics := ingest.NewMetrics()
	if err := metrics.Register(reg); err != nil {
		return err
	}

	// The state file's lock first: a second serve on the same directory
	// must stop here, before it starts a second NATS server on the same
	// JetStream store.
	db, err := store.Open(filepath.Join(cfg.Store.Dir, dbFile), store.Options{})
	if err != nil {
		return err
	}
	defer func() {
		if err := db.Close(); err != nil {
			log.Error().Err(err).Msg("state file close")
		}
	}()

	bus, err := ingest.Connect(ctx, busOptions(cfg, *natsPort, &log, metrics))
	if errors.Is(err, ingest.ErrPortInUse) {
		return fmt.Errorf("%w; choose another with --nats-port", err)
	}
	if err != nil {
		return err
	}
	defer bus.Close()

	opts := serviceOptions(cfg, db, &log, metrics)
	opts.Conn = bus.Conn()
	opts.StopTimeout = *stopTimeout
	opts.ResetPosition = *resetPosition
	var board *demoplant.Board
	if *demo {
		board = demoplant.NewBoard(classUnit(cfg))
		opts.OnPaneClose = board.PaneClosed
	}
	svc, err := ingest.New(opts)
	if err != nil {
		return err
	}

	stopAPI, err := readapi.Serve(bus.Conn(), db, log, svc.Subjects()...)
	if err != nil {
		return err
	}
	// Shutdown order: the read API (with calibrations, which Run stops
	// first), ingest, the last alerts from the outbox, the database, the
	// bus. The API stops as soon as shutdown starts, so no request is
	// answered from a state about to close.
	runCtx, cancel := context.WithCancel(ctx)
	apiStopped := make(chan struct{})
	go func() {
		defer close(apiStopped)
		<-runCtx.Done()
		stopAPI()
	}()
	defer func() { cancel(); <-apiStopped }()

	if cfg.HTTP.Addr != "off" {
		token := ""
		if cfg.HTTP.TokenEnv != "" {
			// An empty variable would open the pages to anyone: refuse.
			if token = os.Getenv(cfg.HTTP.TokenEnv); token == "" {
				return fmt.Errorf("http.token_env: environment variable %s is empty or not set", cfg.HTTP.TokenEnv)
			}
		}
		mux := http.NewServeMux()
		mux.Handle("/metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{}))
		mux.Handle("/", web.Handler(web.Options{DB: db, Token: token, Logger: log, Judgements: svc.Judgements,
			Rule: func(id string) (alert.Rule, bool) {
				r, ok, err := ruleFor(cfg, id)
				return r, ok && err == nil
			}}))
		stop, err := serveHTTP(cfg.HTTP.Addr, mux, log, "metrics and pages", *stopTimeout)
		if err != nil {
			return err
		}
		defer stop()
	}
	if *pprofAddr != "" {
		if host, _, err := net.SplitHostPort(*pprofAddr); err != nil || !isLoopback(host) {
			return usageError("--pprof-addr %q: want a loopback address such as 127.0.0.1:6060", *pprofAddr)
		}
		mux := http.NewServeMux()
		mux.HandleFunc("/debug/pprof/", pprof.Index)
		mux.HandleFunc("/debug/pprof/profile", pprof.Profile)
		mux.HandleFunc("/debug/pprof/trace", pprof.Trace)
		stop, err := serveHTTP(*pprofAddr, mux, log, "pprof", *stopTimeout)
		if err != nil {
			return err
		}
		defer stop()
	}

	demoDone := make(chan error, 1)
	boardDone := make(chan struct{})
	if *demo {
		go func() {
			demoDone <- demoplant.Publish(runCtx, bus.Conn(), demoplant.Options{Prefix: cfg.Bus.SubjectPrefix, Live: true, Bad: true}, log)
		}()
		go func() {
			defer close(boardDone)
			board.Run(runCtx, 10*time.Second, 3, log.With().Str("component", "demo").Logger())
		}()
	} else {
		demoDone <- nil
		close(boardDone)
	}
	// The caution travels in every event and ticket; the log says it once.
	log.Info().Str("caution", alert.Caution).Msg("alert rules active")
	err = svc.Run(runCtx)
	cancel()
	if derr := <-demoDone; derr != nil && !errors.Is(derr, context.Canceled) {
		log.Error().Err(derr).Msg("demo feed")
	}
	<-boardDone
	return err
}

// serviceOptions maps the configuration onto the service's options:
// serve and bench build their service from it alike.
// The caller sets Conn, the one thing the configuration does not give.
func serviceOptions(cfg *configs.Config, db *store.DB, log *zerolog.Logger, m *ingest.Metrics) ingest.Options {
	return ingest.Options{
		DB:                       db,
		Sensor:                   sensorConfig(cfg),
		Rule:                     rules(cfg, log),
		Mode:                     ingestMode(cfg.Bus.Mode),
		SubjectPrefix:            cfg.Bus.SubjectPrefix,
		RejectedSubject:          cfg.Bus.RejectedSubject,
		StreamName:               cfg.Bus.StreamName,
		AlertSubjectPrefix:       cfg.Bus.AlertSubjectPrefix,
		TicketSubject:            cfg.Bus.TicketSubject,
		CalibrationSubjectPrefix: cfg.Bus.CalibrationSubjectPrefix,
		Webhook:                  webhookFromConfig(cfg),
		CommitInterval:           cfg.Store.CommitInterval,
		CommitReadings:           cfg.Store.CommitReadings,
		CommitMaxSensors:         cfg.Store.CommitMaxSensors,
		FutureSkew:               cfg.Bus.FutureSkew,
		MaxPayload:               cfg.Bus.MaxPayloadBytes,
		HistoryRetention:         cfg.Store.HistoryRetention,
		HistoryThinAfter:         cfg.Store.HistoryThinAfter,
		HistoryThinTo:            cfg.Store.HistoryThinTo,
		StreamMaxBytes:           int64(cfg.Bus.StreamMaxBytes),
		StreamMaxAge:             cfg.Bus.StreamMaxAge,
		RejectedMaxBytes:         int64(cfg.Bus.RejectedMaxBytes),
		RejectedMaxAge:           cfg.Bus.RejectedMaxAge,
		MaxSensors:               cfg.Bus.MaxSensors,
		Logger:                   log,
		Metrics:                  m,
	}
}

func ingestMode(m configs.Mode) ingest.Mode {
	if m == configs.ModeDirect {
		return ingest.ModeDirect
	}
	return ingest.ModeStream
}

// sensorConfig maps the configuration onto what ingest needs per sensor.
// A sensor that matches no class is still fitted, with the default
// windows and no unit check, so no reading is lost to a missing pattern.
func sensorConfig(cfg *configs.Config) func(id string) (ingest.SensorConfig, error) {
	toSpecs := func(ws []configs.Window) []rolling.WindowSpec {
		out := make([]rolling.WindowSpec, len(ws))
		for i, w := range ws {
			out[i] = rolling.WindowSpec{Span: w.Span, Pane: w.Pane}
		}
		return out
	}
	return func(id string) (ingest.SensorConfig, error) {
		c, err := cfg.ClassFor(id)
		if errors.Is(err, configs.ErrNoClass) {
			return ingest.SensorConfig{Windows: toSpecs(cfg.Defaults.Windows)}, nil
		}
		if err != nil {
			return ingest.SensorConfig{}, err
		}
		return ingest.SensorConfig{Windows: toSpecs(c.Windows), Unit: c.Unit, Group: c.Group,
			StepRebaseline: c.Detectors.Step.On && c.Detectors.Step.Rebaseline}, nil
	}
}

func isLoopback(host string) bool {
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// serveHTTP serves h on addr until the returned stop is called, which
// waits up to timeout for requests in flight.
func serveHTTP(addr string, h http.Handler, log zerolog.Logger, what string, timeout time.Duration) (stop func(), err error) {
	ln, err := net.Listen("tcp", addr)
	if err != nil {
		return nil, fmt.Errorf("%s listener: %w", what, err)
	}
	srv := &http.Server{Handler: h, ReadHeaderTimeout: 5 * time.Second}
	done := make(chan struct{})
	go func() {
		defer close(done)
		if err := srv.Serve(ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
			log.Error().Err(err).Str("addr", addr).Msg(what + " listener")
		}
	}()
	log.Info().Str("addr", "http://"+ln.Addr().String()).Msg(what + " listening")
	return func() {
		ctx, cancel := context.WithTimeout(context.Background(), timeout)
		defer cancel()
		_ = srv.Shutdown(ctx)
		<-done
	}, nil
}

// busOptions maps the configuration onto the bus connection: the
// embedded server on bus.embedded.host and port (-1: any free port)
// with its store under store.dir, its users and MQTT listener, or
// bus.servers with their credentials. The read commands connect with the
// same options.
func busOptions(cfg *configs.Config, port int, log *zerolog.Logger, m *ingest.Metrics) ingest.BusOptions {
	b := &cfg.Bus
	users := make([]ingest.BusUser, len(b.Embedded.Users))
	for i, u := range b.Embedded.Users {
		users[i] = ingest.BusUser{User: u.User, PasswordEnv: u.PasswordEnv, Role: ingest.Role(u.Role), Sensors: u.Sensors}
	}
	return ingest.BusOptions{
		Servers:    b.Servers,
		Host:       b.Embedded.Host,
		Port:       port,
		StoreDir:   filepath.Join(cfg.Store.Dir, "nats"),
		MaxPayload: max(b.MaxPayloadBytes, 1<<20),
		Users:      users,
		Subjects: ingest.BusSubjects{
			Readings: b.SubjectPrefix, Rejected: b.RejectedSubject, Alerts: b.AlertSubjectPrefix, Tickets: b.TicketSubject,
			Calibrations: b.CalibrationSubjectPrefix, API: readapi.Prefix, Stream: b.StreamName,
		},
		MQTT: b.MQTT.Listen,
		User: b.User, PasswordEnv: b.PasswordEnv, TokenEnv: b.TokenEnv, CredsFile: b.CredsFile,
		CAFile: b.TLS.CAFile, CertFile: b.TLS.CertFile, KeyFile: b.TLS.KeyFile,
		Logger: log, Metrics: m,
	}
}

// privateDir creates the data directory with mode 0700, or tightens an
// existing one to it: the state file, the JetStream store and the
// webhook's outbox are nobody else's to read. A directory that had to be
// tightened is logged, once.
func privateDir(dir string, log zerolog.Logger) error {
	if err := os.MkdirAll(dir, 0o700); err != nil {
		return err
	}
	fi, err := os.Stat(dir)
	if err != nil {
		return err
	}
	if perm := fi.Mode().Perm(); perm&0o077 != 0 {
		if err := os.Chmod(dir, 0o700); err != nil {
			return fmt.Errorf("data directory %s has mode %04o, readable by others, and cannot be tightened: %w", dir, perm, err)
		}
		log.Warn().Str("dir", dir).Str("was", fmt.Sprintf("%04o", perm)).Str("now", "0700").Msg("data directory was open to other users: tightened")
	}
	return nil
}
