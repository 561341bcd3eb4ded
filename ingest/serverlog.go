package ingest

import (
	"fmt"
	"sync"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/rs/zerolog"
)

// serverLog carries the embedded NATS server's log into zerolog. The
// server logs printf-style text; that text is the one field of a constant
// message, because its wording is the server's, not ours. Warnings and
// errors are counted by level (Metrics.ServerLog): the server drops
// messages with a warning (for one, "Dropping messages due to excessive
// stream ingest rate"), and those must not go unseen.
type serverLog struct {
	log zerolog.Logger
	m   *Metrics

	mu    sync.Mutex
	fatal string // the first fatal statement, for Connect's error
}

// NewServerLogger returns a server.Logger that writes to log (with
// component "nats-server") and counts warnings and errors in m (nil:
// none). Fatal statements are logged as errors and do not exit: the
// server stops itself after one.
func NewServerLogger(log zerolog.Logger, m *Metrics) server.Logger {
	return newServerLog(log, m)
}

func newServerLog(log zerolog.Logger, m *Metrics) *serverLog {
	return &serverLog{log: log.With().Str("component", "nats-server").Logger(), m: m}
}

func (l *serverLog) count(level string) {
	if l.m != nil {
		l.m.ServerLog.WithLabelValues(level).Inc()
	}
}

func (l *serverLog) Noticef(format string, v ...any) {
	l.log.Info().Str("text", fmt.Sprintf(format, v...)).Msg("nats server")
}

func (l *serverLog) Warnf(format string, v ...any) {
	l.count("warn")
	l.log.Warn().Str("text", fmt.Sprintf(format, v...)).Msg("nats server")
}

func (l *serverLog) Errorf(format string, v ...any) {
	l.count("error")
	l.log.Error().Str("text", fmt.Sprintf(format, v...)).Msg("nats server")
}

func (l *serverLog) Fatalf(format string, v ...any) {
	text := fmt.Sprintf(format, v...)
	l.mu.Lock()
	if l.fatal == "" {
		l.fatal = text
	}
	l.mu.Unlock()
	l.count("fatal")
	l.log.Error().Str("text", text).Msg("nats server fatal")
}

func (l *serverLog) Debugf(format string, v ...any) {
	l.log.Debug().Str("text", fmt.Sprintf(format, v...)).Msg("nats server")
}

func (l *serverLog) Tracef(format string, v ...any) {
	l.log.Trace().Str("text", fmt.Sprintf(format, v...)).Msg("nats server")
}

func (l *serverLog) fatalText() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.fatal
}
