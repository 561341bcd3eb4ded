package readapi

import (
	"bytes"
	"context"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"time"

	"github.com/nats-io/nats.go"

	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// Client reads a running service's state through its read API. It has
// the reading methods of *store.DB that the commands use, so either can
// stand behind one interface. It is safe for concurrent use.
type Client struct {
	nc  *nats.Conn
	url string
}

// Dial connects to the NATS server at url, without credentials; name
// labels the connection in the server's monitoring.
func Dial(url, name string) (*Client, error) {
	return DialBus(ingest.BusOptions{Servers: []string{url}}, name)
}

// DialBus connects to the service's bus as o says: any of o.Servers, with
// the credentials and TLS of ingest.ClientOptions, as serve connects.
// Messages name the servers with their secrets masked.
func DialBus(o ingest.BusOptions, name string) (*Client, error) {
	shown := ingest.RedactURLs(o.Servers)
	opts := append([]nats.Option{nats.Name(name), nats.Timeout(2 * time.Second),
		// Refusals are read from LastError where they matter (refused);
		// nats.go would print them on standard error.
		nats.ErrorHandler(func(*nats.Conn, *nats.Subscription, error) {}),
	}, ingest.ClientOptions(o)...)
	nc, err := nats.Connect(strings.Join(o.Servers, ","), opts...)
	if err != nil {
		return nil, fmt.Errorf("connect to the service at %s: %w", shown, err)
	}
	return &Client{nc: nc, url: shown}, nil
}

// Path names where the client reads, for messages.
func (c *Client) Path() string { return "the service at " + c.url }

// Close closes the connection. It always returns nil.
func (c *Client) Close() error { c.nc.Close(); return nil }

// request sends data to subject and hands each reply's payload to fn
// until the last one.
func (c *Client) request(subject string, data []byte, fn func([]byte) error) error {
	inbox := c.nc.NewRespInbox()
	before := c.nc.LastError()
	sub, err := c.nc.SubscribeSync(inbox)
	if err != nil {
		return err
	}
	defer sub.Unsubscribe()
	if err := c.nc.PublishRequest(subject, inbox, data); err != nil {
		return err
	}
	if err := c.refused(subject, before); err != nil {
		return err
	}
	for {
		m, err := sub.NextMsg(Timeout)
		if errors.Is(err, nats.ErrTimeout) {
			return fmt.Errorf("%w at %s on %s within %v", ErrNoAnswer, c.url, subject, Timeout)
		}
		if err != nil {
			return err
		}
		if len(m.Data) > 0 {
			if err := fn(m.Data); err != nil {
				return err
			}
		}
		if e := m.Header.Get(HeaderError); e != "" {
			return &ServiceError{Subject: subject, Msg: e}
		}
		if m.Header.Get(HeaderMore) == "" {
			return nil
		}
	}
}

// refused waits until the server has read what was sent, and returns
// the refusal if it refused to let this client publish on subject or
// take the reply (the server answers a PING only after the error of
// what came before it, and nats.go records that error on reading it).
// before is the connection's last error from before the request:
// nats.go keeps the last error until the next, so only a new one is
// this request's.
func (c *Client) refused(subject string, before error) error {
	if err := c.nc.Flush(); err != nil {
		return err
	}
	if err := c.nc.LastError(); err != before && errors.Is(err, nats.ErrPermissionViolation) {
		return fmt.Errorf("%w: a request on %s at %s: %w", ErrRefused, subject, c.url, err)
	}
	return nil
}

func newRequest(sensor string, window rolling.WindowSpec, since, until time.Time) ([]byte, error) {
	q := Request{Sensor: sensor, SpanNs: int64(window.Span), PaneNs: int64(window.Pane)}
	if !since.IsZero() {
		q.SinceNs = since.UnixNano()
	}
	if !until.IsZero() {
		q.UntilNs = until.UnixNano()
	}
	return json.Marshal(q)
}

// History calls fn with the fit records of sensor, as store.DB.History.
func (c *Client) History(sensor string, window rolling.WindowSpec, since, until time.Time, fn func(store.HistoryRecord) error) error {
	data, err := newRequest(sensor, window, since, until)
	if err != nil {
		return err
	}
	return c.request(HistorySubject, data, func(b []byte) error {
		for len(b) > 0 {
			rec, n, err := store.DecodeHistoryRecord(b)
			if err != nil {
				return fmt.Errorf("%w: %w", ErrMalformedReply, err)
			}
			if err := fn(rec); err != nil {
				return err
			}
			b = b[n:]
		}
		return nil
	})
}

// HistorySensors calls fn with every sensor id that has fit history, as
// store.DB.HistorySensors.
func (c *Client) HistorySensors(fn func(id string) error) error {
	return c.request(SensorsSubject, nil, func(b []byte) error {
		for len(b) > 0 {
			id, rest, _ := bytes.Cut(b, []byte{'\n'})
			if err := fn(string(id)); err != nil {
				return err
			}
			b = rest
		}
		return nil
	})
}

// Events calls fn with the stored alert events, as store.DB.Events.
func (c *Client) Events(since, until time.Time, fn func(at time.Time, data []byte) error) error {
	data, err := newRequest("", rolling.WindowSpec{}, since, until)
	if err != nil {
		return err
	}
	return c.request(EventsSubject, data, func(b []byte) error {
		for len(b) > 0 {
			at, k := binary.Varint(b)
			if k <= 0 {
				return ErrMalformedReply
			}
			ev, rest, err := readFrame(b[k:])
			if err != nil {
				return err
			}
			if err := fn(time.Unix(0, at), ev); err != nil {
				return err
			}
			b = rest
		}
		return nil
	})
}

// Tickets calls fn with the stored tickets, as store.DB.Tickets.
func (c *Client) Tickets(fn func(id string, data []byte) error) error {
	return c.request(TicketsSubject, nil, func(b []byte) error {
		for len(b) > 0 {
			id, rest, err := readFrame(b)
			if err != nil {
				return err
			}
			tk, rest, err := readFrame(rest)
			if err != nil {
				return err
			}
			if err := fn(string(id), tk); err != nil {
				return err
			}
			b = rest
		}
		return nil
	})
}

// Identity asks the service which state file it holds.
func (c *Client) Identity() (Identity, error) {
	var id Identity
	var data []byte
	err := c.request(IdentitySubject, nil, func(b []byte) error { data = append(data, b...); return nil })
	if err != nil {
		return id, err
	}
	if err := json.Unmarshal(data, &id); err != nil || id.Path == "" {
		return id, fmt.Errorf("%w: identity %q", ErrMalformedReply, data)
	}
	return id, nil
}

// CheckHolds returns nil when the service holds the state file at path
// (compared as CanonicalPath), else a *MismatchError naming both files.
func (c *Client) CheckHolds(path string) error {
	id, err := c.Identity()
	if err != nil {
		return fmt.Errorf("cannot tell which state file the service at %s holds: %w", c.url, err)
	}
	if want := CanonicalPath(path); id.Path != want {
		return &MismatchError{URL: c.url, Want: want, Holds: id.Path}
	}
	return nil
}

// Calibrate sends a calibration request on prefix.sensor (a
// calibration to record, or a void or correction of one) and waits for
// the service's answer (at most Timeout). It returns the record the
// service stored, or nil when its answer carries none. Requests on one
// Client are told apart only when made one at a time: a refusal by the
// bus's permissions is the connection's, not the request's.
func (c *Client) Calibrate(ctx context.Context, prefix, sensor string, cal ingest.CalibrationMsg) (*ingest.CalibrationRecord, error) {
	payload, err := json.Marshal(cal)
	if err != nil {
		return nil, err
	}
	ctx, cancel := context.WithTimeout(ctx, Timeout)
	defer cancel()
	subject := prefix + "." + sensor
	inbox := c.nc.NewRespInbox()
	before := c.nc.LastError()
	sub, err := c.nc.SubscribeSync(inbox)
	if err != nil {
		return nil, err
	}
	defer sub.Unsubscribe()
	if err := c.nc.PublishRequest(subject, inbox, payload); err != nil {
		return nil, err
	}
	if err := c.refused(subject, before); err != nil {
		return nil, err
	}
	msg, err := sub.NextMsgWithContext(ctx)
	if err != nil {
		return nil, fmt.Errorf("%w at %s: %w", ErrNoAnswer, c.url, err)
	}
	var ans ingest.CalibrationReply
	if err := json.Unmarshal(msg.Data, &ans); err != nil {
		return nil, fmt.Errorf("%w: %w", ErrMalformedReply, err)
	}
	if !ans.OK {
		return nil, &ServiceError{Subject: prefix + "." + sensor, Msg: ans.Error}
	}
	return ans.Record, nil
}

// Calibrations calls fn with the stored calibration records of sensor
// (every sensor when ""), as store.DB.Calibrations; a damaged record
// comes with data nil.
func (c *Client) Calibrations(sensor string, fn func(sensor string, n uint64, data []byte) error) error {
	q, err := json.Marshal(Request{Sensor: sensor})
	if err != nil {
		return err
	}
	return c.request(CalibrationsSubject, q, func(b []byte) error {
		for len(b) > 0 {
			id, rest, err := readFrame(b)
			if err != nil {
				return err
			}
			n, k := binary.Uvarint(rest)
			if k <= 0 || n == 0 {
				return ErrMalformedReply
			}
			data, rest, err := readFrame(rest[k:])
			if err != nil {
				return err
			}
			if len(data) == 0 {
				data = nil
			}
			if err := fn(string(id), n, data); err != nil {
				return err
			}
			b = rest
		}
		return nil
	})
}
