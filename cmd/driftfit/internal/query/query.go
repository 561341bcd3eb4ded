// Package query selects what the reading commands (history, alerts,
// tickets, calibrations) show: it opens the state file, or asks the running service
// that holds it, parses their time and window arguments, and walks the
// records, explaining an empty answer.
package query

import (
	"errors"
	"fmt"
	"os"
	"strings"
	"time"

	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/ingest/readapi"
	"driftfit/rolling"
	"driftfit/store"
)

// Source is where the commands read from: the file itself (*store.DB)
// or a running service that holds it (*readapi.Client).
type Source interface {
	History(sensor string, window rolling.WindowSpec, since, until time.Time, fn func(store.HistoryRecord) error) error
	HistorySensors(fn func(id string) error) error
	Events(since, until time.Time, fn func(at time.Time, data []byte) error) error
	Tickets(fn func(id string, data []byte) error) error
	Calibrations(sensor string, fn func(sensor string, n uint64, data []byte) error) error
	Path() string
	Close() error
}

var (
	_ Source = (*store.DB)(nil)
	_ Source = (*readapi.Client)(nil)
)

// LockWait bounds the wait for the file lock. A read-only open takes a
// shared flock, a running service holds an exclusive one for as long as
// it has the file open, so waiting longer would not help; a second is
// enough to ride out another reader's open or a service that is just
// exiting.
const LockWait = time.Second

// Open opens the state file at path read-only; when a running service
// holds it, it asks that service on the bus instead, connecting as bus
// says (name labels the connection), once the service has said it holds
// this very file. The common failures come back as advice; no message
// shows a password.
func Open(path string, bus ingest.BusOptions, name string) (Source, error) {
	if _, err := os.Stat(path); err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return nil, fmt.Errorf("no database file at %s (give --db FILE, --data DIR or --config FILE)", path)
		}
		return nil, err
	}
	db, err := store.Open(path, store.Options{ReadOnly: true, LockTimeout: LockWait})
	if errors.Is(err, store.ErrLocked) {
		remote, rerr := readapi.DialBus(bus, name)
		if rerr != nil {
			return nil, fmt.Errorf("%s is in use by a running driftfit serve (or another process writing it), "+
				"and no service answers at %s (%v): give --servers with the service's NATS address, "+
				"or stop the service and retry: %w", path, ingest.RedactURLs(bus.Servers), rerr, err)
		}
		if err := remote.CheckHolds(path); err != nil {
			remote.Close()
			return nil, fmt.Errorf("%s is in use, but not by the service asked: %w", path, err)
		}
		return remote, nil
	}
	if err != nil {
		return nil, err
	}
	return db, nil
}

// UsageError is a bad command-line value: the flag, the value and what
// was wanted.
type UsageError struct {
	Flag, Value, Want string
}

func (e *UsageError) Error() string {
	if e.Value == "" {
		return "--" + e.Flag + ": " + e.Want
	}
	return fmt.Sprintf("--%s %q: %s", e.Flag, e.Value, e.Want)
}

// ParseTime parses a --since or --until value: RFC 3339, a date
// (midnight UTC) or a positive duration back from now. Empty gives the
// zero time (open end).
func ParseTime(flagName, s string, now time.Time) (time.Time, error) {
	if s == "" {
		return time.Time{}, nil
	}
	if t, err := time.Parse(time.RFC3339Nano, s); err == nil {
		return t, nil
	}
	if t, err := time.Parse(time.DateOnly, s); err == nil {
		return t, nil
	}
	d, err := configs.ParseDuration(s)
	if err != nil {
		return time.Time{}, &UsageError{flagName, s, "want a duration such as 30d, a date or RFC 3339 time"}
	}
	if d <= 0 {
		return time.Time{}, &UsageError{flagName, s, "a duration back from now must be positive"}
	}
	return now.Add(-d), nil
}

// ParseWindow parses "SPAN" or "SPAN/PANE". With a pane the spec is
// returned too; the span alone selects every window of that span.
func ParseWindow(s string) (time.Duration, rolling.WindowSpec, error) {
	spanText, paneText, hasPane := strings.Cut(s, "/")
	span, err := configs.ParseDuration(spanText)
	if err != nil {
		return 0, rolling.WindowSpec{}, &UsageError{"window", s, err.Error()}
	}
	if span <= 0 {
		return 0, rolling.WindowSpec{}, &UsageError{"window", s, "span must be positive"}
	}
	if !hasPane {
		return span, rolling.WindowSpec{}, nil
	}
	pane, err := configs.ParseDuration(paneText)
	if err != nil {
		return 0, rolling.WindowSpec{}, &UsageError{"window", s, "pane: " + err.Error()}
	}
	spec := rolling.WindowSpec{Span: span, Pane: pane}
	if _, err := rolling.NewSensor(spec); err != nil {
		return 0, rolling.WindowSpec{}, &UsageError{"window", s, err.Error()}
	}
	return span, spec, nil
}
