package ingest

import (
	"context"
	"errors"
	"fmt"
	"net"
	"os"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"
)

// BusOptions configure Connect. With no Servers, Connect starts an
// embedded NATS server with JetStream and connects to it in process;
// otherwise it connects to Servers. Zero fields take the documented
// defaults.
type BusOptions struct {
	// Servers are NATS URLs. Empty: run an embedded server.
	Servers []string

	// Host is the embedded server's listen address. Default 127.0.0.1.
	Host string
	// Port is the embedded server's port on Host: 0 means 4222 (the
	// NATS default), -1 any free port.
	Port int
	// StoreDir holds the embedded server's JetStream files. Required
	// for the embedded server.
	StoreDir string
	// MaxPayload is the embedded server's largest message, in bytes.
	// Default 1 MiB.
	MaxPayload int
	// MaxStore bounds the embedded server's JetStream files, in bytes.
	// Zero: the server's own default (a share of the free disk).
	MaxStore int64
	// Users of the embedded server, with the permissions of their roles
	// over Subjects. Empty: no authentication. With users, the service
	// connects as ServiceUser with a password made at start.
	Users []BusUser
	// Subjects are the service's subjects, from which the users'
	// permissions are built.
	Subjects BusSubjects
	// MQTT is the host:port of the embedded server's MQTT listener
	// (port -1: any free port). Empty: no MQTT.
	MQTT string

	// User and the password in the environment variable PasswordEnv
	// authenticate to Servers; so do a token in TokenEnv, or a
	// credentials file (JWT and nkey seed). Empty: not used.
	User, PasswordEnv, TokenEnv, CredsFile string
	// CAFile is a PEM file of the CAs to trust; CertFile and KeyFile a
	// client certificate and its key. Empty: not used.
	CAFile, CertFile, KeyFile string
	// Getenv reads the environment variables named above. Default
	// os.Getenv.
	Getenv func(string) string

	// Name is the connection's name on the server. Default "driftfit".
	Name string
	// ReconnectWait is the wait between connection attempts, to which
	// the client adds up to a second of jitter. Default 1s.
	ReconnectWait time.Duration
	// CheckInterval is how often the embedded server's counts (slow
	// consumers, JetStream store) are read. Default 10s.
	CheckInterval time.Duration
	// Logger receives the connection's state changes, each failed
	// attempt with its reason, and the embedded server's log. Default: a
	// disabled logger.
	Logger *zerolog.Logger
	// Metrics, if not nil, get BusConnected, SlowConsumer and the
	// embedded server's counts.
	Metrics *Metrics
}

// Bus is a NATS connection, and the embedded server behind it if Connect
// started one. Close it once done; its methods are safe for concurrent
// use.
type Bus struct {
	nc      *nats.Conn
	ns      *server.Server
	servers []string
	log     zerolog.Logger
	// self authenticates connections to the embedded server; nil when it
	// runs without users.
	self nats.Option

	stop chan struct{}
	wg   sync.WaitGroup
	once sync.Once
}

// Conn returns the connection. It stays valid until Close.
func (b *Bus) Conn() *nats.Conn { return b.nc }

// NewConn opens another connection to the same bus: in process to the
// embedded server (as ServiceUser when it has users), else to Servers
// with opts only (no credentials). The caller closes it.
func (b *Bus) NewConn(opts ...nats.Option) (*nats.Conn, error) {
	if b.ns != nil {
		opts = append(opts, nats.InProcessServer(b.ns))
		if b.self != nil {
			opts = append(opts, b.self)
		}
		return nats.Connect(b.ns.ClientURL(), opts...)
	}
	return nats.Connect(strings.Join(b.servers, ","), opts...)
}

// MQTTAddr returns the host:port of the embedded server's MQTT
// listener, or "" when there is none.
func (b *Bus) MQTTAddr() string {
	if b.ns == nil {
		return ""
	}
	v, err := b.ns.Varz(nil)
	if err != nil || v.MQTT.Port <= 0 {
		return ""
	}
	return net.JoinHostPort(v.MQTT.Host, strconv.Itoa(v.MQTT.Port))
}

// Server returns the embedded server, or nil when connected to Servers.
func (b *Bus) Server() *server.Server { return b.ns }

// SlowConsumers returns the embedded server's count of clients it cut
// off as slow consumers since it started; 0 for Servers.
func (b *Bus) SlowConsumers() uint64 {
	if b.ns == nil {
		return 0
	}
	return uint64(b.ns.NumSlowConsumers())
}

// ClientURL returns the embedded server's URL for other clients, or ""
// when connected to Servers.
func (b *Bus) ClientURL() string {
	if b.ns == nil {
		return ""
	}
	return b.ns.ClientURL()
}

// Close closes the connection and shuts the embedded server down. It is
// idempotent and returns nil.
func (b *Bus) Close() error {
	b.once.Do(func() {
		close(b.stop)
		b.wg.Wait()
		if b.nc != nil {
			b.nc.Close()
		}
		if b.ns != nil {
			b.ns.Shutdown()
			b.ns.WaitForShutdown()
		}
	})
	return nil
}

// PortError is returned by Connect when the embedded server cannot listen
// on its address. It unwraps to ErrPortInUse when another program holds
// the port, else to the listen error.
type PortError struct {
	Addr string
	Err  error
}

func (e *PortError) Error() string {
	if errors.Is(e.Err, ErrPortInUse) {
		return "ingest: embedded NATS server: port " + e.Addr + " is in use by another program"
	}
	return "ingest: embedded NATS server: listen on " + e.Addr + ": " + e.Err.Error()
}

func (e *PortError) Unwrap() error { return e.Err }

// Connect starts the embedded server or connects to Servers, and returns
// once connected. A bus that is down is retried every ReconnectWait,
// logging each failed attempt with its reason, until ctx is done; the
// error then names the last reason (wrong password, unknown CA, missing
// client certificate, refused connection...). Once connected, the
// connection reconnects forever, logging every change of state.
func Connect(ctx context.Context, o BusOptions) (*Bus, error) {
	if o.Logger == nil {
		l := zerolog.Nop()
		o.Logger = &l
	}
	if o.Name == "" {
		o.Name = "driftfit"
	}
	if o.ReconnectWait <= 0 {
		o.ReconnectWait = time.Second
	}
	if o.CheckInterval <= 0 {
		o.CheckInterval = 10 * time.Second
	}
	if o.Getenv == nil {
		o.Getenv = os.Getenv
	}
	b := &Bus{servers: o.Servers, log: o.Logger.With().Str("component", "bus").Logger(), stop: make(chan struct{})}
	m := o.Metrics
	var lastErr atomic.Pointer[error]
	opts := []nats.Option{
		nats.Name(o.Name),
		nats.MaxReconnects(-1),
		nats.ReconnectWait(o.ReconnectWait),
		nats.ReconnectJitter(500*time.Millisecond, time.Second),
		nats.ConnectHandler(func(nc *nats.Conn) {
			m.connected(1)
			b.log.Info().Str("url", RedactURL(nc.ConnectedUrl())).Msg("bus connected")
		}),
		nats.DisconnectErrHandler(func(_ *nats.Conn, err error) {
			m.connected(0)
			b.log.Warn().Err(err).Msg("bus disconnected")
		}),
		nats.ReconnectHandler(func(nc *nats.Conn) {
			m.connected(1)
			b.log.Info().Str("url", RedactURL(nc.ConnectedUrl())).Msg("bus reconnected")
		}),
		nats.ReconnectErrHandler(func(_ *nats.Conn, err error) {
			lastErr.Store(&err)
			b.log.Warn().Err(err).Msg("bus connection attempt failed")
		}),
		nats.ClosedHandler(func(*nats.Conn) {
			m.connected(0)
			b.log.Info().Msg("bus connection closed")
		}),
		nats.ErrorHandler(func(_ *nats.Conn, sub *nats.Subscription, err error) {
			if errors.Is(err, nats.ErrSlowConsumer) && m != nil {
				m.SlowConsumer.Inc()
			}
			ev := b.log.Warn().Err(err)
			if sub != nil {
				ev = ev.Str("subject", sub.Subject)
			}
			ev.Msg("bus error")
		}),
	}
	if len(o.Servers) == 0 {
		if err := b.startServer(o); err != nil {
			return nil, err
		}
		opts = append(opts, nats.InProcessServer(b.ns))
		if b.self != nil {
			opts = append(opts, b.self)
		}
		nc, err := nats.Connect(b.ns.ClientURL(), opts...)
		if err != nil {
			b.Close()
			return nil, fmt.Errorf("ingest: connect to the embedded NATS server: %w", err)
		}
		b.nc = nc
		m.connected(1)
		b.wg.Add(1)
		go b.watchServer(o.CheckInterval, m)
		return b, nil
	}

	opts = append(opts, ClientOptions(o)...)
	// The bus may come up after us: keep trying, one log line an attempt.
	opts = append(opts, nats.RetryOnFailedConnect(true))
	urls := strings.Join(o.Servers, ",")
	nc, err := nats.Connect(urls, opts...)
	if err != nil {
		return nil, fmt.Errorf("ingest: connect to %s: %w", RedactURLs(o.Servers), err)
	}
	b.nc = nc
	for !nc.IsConnected() {
		last := func() error {
			if p := lastErr.Load(); p != nil {
				return *p
			}
			if err := nc.LastError(); err != nil {
				return err
			}
			return errors.New("no attempt finished")
		}
		if nc.IsClosed() {
			return nil, fmt.Errorf("ingest: connect to %s: connection closed: %w", RedactURLs(o.Servers), last())
		}
		select {
		case <-ctx.Done():
			err := fmt.Errorf("ingest: connect to %s: %w; last attempt: %w%s", RedactURLs(o.Servers), ctx.Err(), last(), certHint(o))
			nc.Close()
			return nil, err
		case <-time.After(20 * time.Millisecond):
		}
	}
	return b, nil
}

// ClientOptions are the credential and TLS options of a connection to
// o.Servers: user and password (from the variable PasswordEnv), token
// (from TokenEnv), credentials file, CA and client certificate. Connect
// uses them, and so does every other client of the service's bus, so
// that all connect alike. A nil o.Getenv reads os.Getenv.
func ClientOptions(o BusOptions) []nats.Option {
	if o.Getenv == nil {
		o.Getenv = os.Getenv
	}
	var opts []nats.Option
	if o.User != "" {
		pw := ""
		if o.PasswordEnv != "" {
			pw = o.Getenv(o.PasswordEnv)
		}
		opts = append(opts, nats.UserInfo(o.User, pw))
	}
	if o.TokenEnv != "" {
		opts = append(opts, nats.Token(o.Getenv(o.TokenEnv)))
	}
	if o.CredsFile != "" {
		opts = append(opts, nats.UserCredentials(o.CredsFile))
	}
	if o.CAFile != "" {
		opts = append(opts, nats.RootCAs(o.CAFile))
	}
	if o.CertFile != "" {
		opts = append(opts, nats.ClientCert(o.CertFile, o.KeyFile))
	}
	return opts
}

// startServer starts the embedded server and waits until it takes
// connections.
func (b *Bus) startServer(o BusOptions) error {
	if o.StoreDir == "" {
		return errors.New("ingest: BusOptions need StoreDir for the embedded NATS server")
	}
	host, port := o.Host, o.Port
	if host == "" {
		host = "127.0.0.1"
	}
	if port == 0 {
		port = 4222
	}
	addr := net.JoinHostPort(host, strconv.Itoa(port))
	if port > 0 {
		// Find out now, and why: the server only logs a failed listen.
		ln, err := net.Listen("tcp", addr)
		if err != nil {
			if errors.Is(err, syscall.EADDRINUSE) {
				err = ErrPortInUse
			}
			return &PortError{Addr: addr, Err: err}
		}
		ln.Close()
	}
	maxPayload := o.MaxPayload
	if maxPayload <= 0 {
		maxPayload = 1 << 20
	}
	users, selfPw, err := serverUsers(o)
	if err != nil {
		return err
	}
	sopts := &server.Options{
		ServerName:        "driftfit-embedded",
		Host:              host,
		Port:              port,
		JetStream:         true,
		StoreDir:          o.StoreDir,
		JetStreamMaxStore: o.MaxStore,
		NoSigs:            true,
		NoLog:             true, // the logger is set below
		MaxPayload:        int32(min(maxPayload, 64<<20)),
		Users:             users,
	}
	if o.MQTT != "" {
		mh, mp, err := net.SplitHostPort(o.MQTT)
		if err != nil {
			return fmt.Errorf("ingest: MQTT listen address %q: %w", o.MQTT, err)
		}
		p, err := strconv.Atoi(mp)
		if err != nil || p < -1 || p == 0 || p > 65535 {
			return fmt.Errorf("ingest: MQTT listen address %q: port must be 1..65535 or -1", o.MQTT)
		}
		if p > 0 {
			ln, err := net.Listen("tcp", o.MQTT)
			if err != nil {
				if errors.Is(err, syscall.EADDRINUSE) {
					err = ErrPortInUse
				}
				return &PortError{Addr: o.MQTT, Err: err}
			}
			ln.Close()
		}
		// nats-server's MQTT keeps sessions and QoS 1 messages in
		// JetStream, which the embedded server runs anyway.
		sopts.MQTT = server.MQTTOpts{Host: mh, Port: p}
	}
	ns, err := server.NewServer(sopts)
	if err != nil {
		return fmt.Errorf("ingest: embedded NATS server: %w", err)
	}
	if selfPw != "" {
		b.self = nats.UserInfo(ServiceUser, selfPw)
	}
	sl := newServerLog(*o.Logger, o.Metrics)
	ns.SetLogger(sl, false, false)
	go ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		ns.Shutdown()
		if f := sl.fatalText(); f != "" {
			return fmt.Errorf("ingest: embedded NATS server on %s: %s", addr, f)
		}
		return fmt.Errorf("ingest: embedded NATS server on %s: not ready after 10s", addr)
	}
	b.ns = ns
	b.log.Info().Str("url", ns.ClientURL()).Str("store", o.StoreDir).Int("users", len(o.Users)).Msg("embedded NATS server listening")
	if len(o.Users) == 0 && beyondLoopback(host) {
		b.log.Warn().Str("host", host).Msg("embedded NATS server listens beyond loopback without authentication: anyone who reaches it can publish readings, calibrate sensors and read all history; configure bus.embedded.users")
	}
	if o.MQTT != "" {
		b.log.Info().Str("addr", b.MQTTAddr()).Msg("embedded MQTT listener open")
		if len(o.Users) == 0 && beyondLoopback(sopts.MQTT.Host) {
			b.log.Warn().Str("host", sopts.MQTT.Host).Msg("embedded MQTT listener open beyond loopback without authentication; configure bus.embedded.users")
		}
	}
	return nil
}

// storeWarn is the fill of the embedded server's JetStream store, as a
// fraction of its limit, from which each check warns.
const storeWarn = 0.9

// watchServer reads the embedded server's own counts every interval:
// clients it cut off as slow consumers (it drops their messages), and
// the fill of its JetStream store.
func (b *Bus) watchServer(interval time.Duration, m *Metrics) {
	defer b.wg.Done()
	tick := time.NewTicker(interval)
	defer tick.Stop()
	var slow int64
	for {
		select {
		case <-b.stop:
			return
		case <-tick.C:
		}
		v, err := b.ns.Varz(nil)
		if err != nil {
			continue
		}
		if m != nil {
			m.ServerSlowConsumers.Set(float64(v.SlowConsumers))
		}
		if v.SlowConsumers > slow {
			b.log.Warn().Int64("slow_consumers", v.SlowConsumers).Int64("new", v.SlowConsumers-slow).Msg("nats server cut off slow consumers: their messages were dropped")
			slow = v.SlowConsumers
		}
		if js := v.JetStream; js.Stats != nil && js.Config != nil && js.Config.MaxStore > 0 &&
			float64(js.Stats.Store) >= storeWarn*float64(js.Config.MaxStore) {
			b.log.Warn().Uint64("bytes", js.Stats.Store).Int64("max_bytes", js.Config.MaxStore).Msg("nats server JetStream store nearly full")
		}
	}
}

// connected sets BusConnected; m may be nil.
func (m *Metrics) connected(v float64) {
	if m != nil {
		m.BusConnected.Set(v)
	}
}

// certHint adds to a failed TLS connection without a client certificate
// what a server that demands one shows only as a closed connection:
// whether the TLS alert or the closed socket reaches the client first is
// a race, and nats.go reports the latter.
func certHint(o BusOptions) string {
	tlsURL := false
	for _, u := range o.Servers {
		tlsURL = tlsURL || strings.HasPrefix(u, "tls://") || strings.HasPrefix(u, "wss://")
	}
	if o.CertFile != "" || o.CAFile == "" && !tlsURL {
		return ""
	}
	return " (no client certificate is configured: if the server demands one, set bus.tls.cert_file and key_file)"
}

// RedactURLs lists urls, comma-separated, each as RedactURL shows it.
func RedactURLs(urls []string) string {
	out := make([]string, len(urls))
	for i, u := range urls {
		out[i] = RedactURL(u)
	}
	return strings.Join(out, ",")
}

// RedactURL returns a NATS URL fit for logs and messages: a password is
// masked, and so is user information without one, which NATS takes as a
// token (nats://TOKEN@host). It works on text that does not parse as a
// URL too.
func RedactURL(u string) string {
	c := strings.Index(u, "://")
	if c < 0 {
		return u
	}
	rest := u[c+3:]
	end := strings.IndexAny(rest, "/?#")
	if end < 0 {
		end = len(rest)
	}
	at := strings.LastIndexByte(rest[:end], '@')
	if at < 0 {
		return u
	}
	user, _, hasPw := strings.Cut(rest[:at], ":")
	if !hasPw {
		user = "xxxxx"
	} else {
		user += ":xxxxx"
	}
	return u[:c+3] + user + rest[at:]
}
