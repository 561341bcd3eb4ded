package main

import (
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/rolling"
	"driftfit/store"
)

// The service answers read requests on the bus, so that history can be
// read while serve holds the state file's lock.
const (
	apiHistorySubject = "driftfit.api.history"
	apiSensorsSubject = "driftfit.api.sensors"
	apiEventsSubject  = "driftfit.api.events"
	apiTicketsSubject = "driftfit.api.tickets"

	headerMore  = "Driftfit-More"  // "1" on every reply but the last
	headerError = "Driftfit-Error" // on the last reply, when the request failed

	// apiChunk bounds one reply's payload, well under NATS's default
	// 1 MiB max_payload.
	apiChunk = 256 << 10
	// apiTimeout bounds the wait for each reply message.
	apiTimeout = 10 * time.Second
)

// historyRequest is the JSON request of apiHistorySubject. Zero fields
// leave that filter open.
type historyRequest struct {
	Sensor  string `json:"sensor"`
	SpanNs  int64  `json:"span_ns,omitempty"`
	PaneNs  int64  `json:"pane_ns,omitempty"`
	SinceNs int64  `json:"since_ns,omitempty"`
	UntilNs int64  `json:"until_ns,omitempty"`
}

// times returns the request's time range; zero ends are open.
func (q *historyRequest) times() (since, until time.Time) {
	if q.SinceNs != 0 {
		since = time.Unix(0, q.SinceNs)
	}
	if q.UntilNs != 0 {
		until = time.Unix(0, q.UntilNs)
	}
	return since, until
}

// newRequest returns the request for a time range; zero ends are open.
func newRequest(sensor string, window rolling.WindowSpec, since, until time.Time) historyRequest {
	q := historyRequest{Sensor: sensor, SpanNs: int64(window.Span), PaneNs: int64(window.Pane)}
	if !since.IsZero() {
		q.SinceNs = since.UnixNano()
	}
	if !until.IsZero() {
		q.UntilNs = until.UnixNano()
	}
	return q
}

// serveAPI answers history, sensor-list, event and ticket requests from
// db. The returned function unsubscribes.
//
// Replies come in chunks of about apiChunk bytes, each but the last with
// the header Driftfit-More; the last carries Driftfit-Error if the request
// failed. Events and tickets travel as frames (uvarint length, bytes): an
// event's frame is preceded by its time (varint Unix ns), a ticket's by
// its id (a frame).
func serveAPI(nc *nats.Conn, db *store.DB, log zerolog.Logger) (func(), error) {
	log = log.With().Str("component", "api").Logger()
	send := func(m *nats.Msg, data []byte, more bool, err error) {
		out := nats.NewMsg(m.Reply)
		out.Data = data
		if more {
			out.Header.Set(headerMore, "1")
		}
		if err != nil {
			out.Header.Set(headerError, err.Error())
		}
		if perr := nc.PublishMsg(out); perr != nil {
			log.Warn().Err(perr).Str("subject", m.Subject).Msg("reply not sent")
		}
	}
	// reply runs walk, which appends to the reply through add, and sends
	// the reply in chunks.
	reply := func(m *nats.Msg, walk func(add func(func([]byte) ([]byte, error)) error) error) {
		var buf []byte
		err := walk(func(app func([]byte) ([]byte, error)) error {
			var err error
			if buf, err = app(buf); err != nil {
				return err
			}
			if len(buf) >= apiChunk {
				send(m, buf, true, nil)
				buf = buf[:0]
			}
			return nil
		})
		send(m, buf, false, err)
	}
	request := func(m *nats.Msg) (historyRequest, bool) {
		var q historyRequest
		if err := json.Unmarshal(m.Data, &q); err != nil {
			send(m, nil, false, fmt.Errorf("bad request: %w", err))
			return q, false
		}
		return q, true
	}
	handlers := map[string]nats.MsgHandler{
		apiHistorySubject: func(m *nats.Msg) {
			q, ok := request(m)
			if !ok {
				return
			}
			since, until := q.times()
			window := rolling.WindowSpec{Span: time.Duration(q.SpanNs), Pane: time.Duration(q.PaneNs)}
			reply(m, func(add func(func([]byte) ([]byte, error)) error) error {
				return db.History(q.Sensor, window, since, until, func(r store.HistoryRecord) error {
					return add(func(b []byte) ([]byte, error) { return store.AppendHistoryRecord(b, &r) })
				})
			})
		},
		apiSensorsSubject: func(m *nats.Msg) {
			reply(m, func(add func(func([]byte) ([]byte, error)) error) error {
				return db.HistorySensors(func(id string) error {
					return add(func(b []byte) ([]byte, error) { return append(append(b, id...), '\n'), nil })
				})
			})
		},
		apiEventsSubject: func(m *nats.Msg) {
			q, ok := request(m)
			if !ok {
				return
			}
			since, until := q.times()
			reply(m, func(add func(func([]byte) ([]byte, error)) error) error {
				return db.Events(since, until, func(at time.Time, data []byte) error {
					return add(func(b []byte) ([]byte, error) {
						return appendFrame(binary.AppendVarint(b, at.UnixNano()), data), nil
					})
				})
			})
		},
		apiTicketsSubject: func(m *nats.Msg) {
			reply(m, func(add func(func([]byte) ([]byte, error)) error) error {
				return db.Tickets(func(id string, data []byte) error {
					return add(func(b []byte) ([]byte, error) { return appendFrame(appendFrame(b, []byte(id)), data), nil })
				})
			})
		},
	}
	var subs []*nats.Subscription
	stop := func() {
		for _, sub := range subs {
			_ = sub.Unsubscribe()
		}
	}
	for subject, h := range handlers {
		sub, err := nc.Subscribe(subject, h)
		if err != nil {
			stop()
			return nil, err
		}
		subs = append(subs, sub)
	}
	return stop, nil
}

func appendFrame(dst, b []byte) []byte {
	return append(binary.AppendUvarint(dst, uint64(len(b))), b...)
}

// readFrame splits one frame off b.
func readFrame(b []byte) (frame, rest []byte, err error) {
	n, k := binary.Uvarint(b)
	if k <= 0 || n > uint64(len(b)-k) {
		return nil, nil, errors.New("malformed reply from the service")
	}
	return b[k : k+int(n)], b[k+int(n):], nil
}

// remoteHistory reads history through a running service's API. It has
// the methods of *store.DB that history uses.
type remoteHistory struct {
	nc  *nats.Conn
	url string
}

func dialRemoteHistory(url string) (*remoteHistory, error) {
	nc, err := nats.Connect(url, nats.Name("driftfit history"), nats.Timeout(2*time.Second))
	if err != nil {
		return nil, err
	}
	return &remoteHistory{nc: nc, url: url}, nil
}

func (r *remoteHistory) Path() string { return "the service at " + r.url }
func (r *remoteHistory) Close() error { r.nc.Close(); return nil }

// request sends data to subject and hands each reply's payload to fn
// until the last one.
func (r *remoteHistory) request(subject string, data []byte, fn func([]byte) error) error {
	inbox := r.nc.NewRespInbox()
	sub, err := r.nc.SubscribeSync(inbox)
	if err != nil {
		return err
	}
	defer sub.Unsubscribe()
	if err := r.nc.PublishRequest(subject, inbox, data); err != nil {
		return err
	}
	for {
		m, err := sub.NextMsg(apiTimeout)
		if errors.Is(err, nats.ErrTimeout) {
			return fmt.Errorf("no answer from the service at %s on %s within %v", r.url, subject, apiTimeout)
		}
		if err != nil {
			return err
		}
		if len(m.Data) > 0 {
			if err := fn(m.Data); err != nil {
				return err
			}
		}
		if e := m.Header.Get(headerError); e != "" {
			return errors.New("service: " + e)
		}
		if m.Header.Get(headerMore) == "" {
			return nil
		}
	}
}

func (r *remoteHistory) History(sensor string, window rolling.WindowSpec, since, until time.Time, fn func(store.HistoryRecord) error) error {
	data, err := json.Marshal(newRequest(sensor, window, since, until))
	if err != nil {
		return err
	}
	return r.request(apiHistorySubject, data, func(b []byte) error {
		for len(b) > 0 {
			rec, n, err := store.DecodeHistoryRecord(b)
			if err != nil {
				return err
			}
			if err := fn(rec); err != nil {
				return err
			}
			b = b[n:]
		}
		return nil
	})
}

func (r *remoteHistory) HistorySensors(fn func(id string) error) error {
	return r.request(apiSensorsSubject, nil, func(b []byte) error {
		for len(b) > 0 {
			i := 0
			for i < len(b) && b[i] != '\n' {
				i++
			}
			if err := fn(string(b[:i])); err != nil {
				return err
			}
			b = b[min(i+1, len(b)):]
		}
		return nil
	})
}

func (r *remoteHistory) Events(since, until time.Time, fn func(at time.Time, data []byte) error) error {
	data, err := json.Marshal(newRequest("", rolling.WindowSpec{}, since, until))
	if err != nil {
		return err
	}
	return r.request(apiEventsSubject, data, func(b []byte) error {
		for len(b) > 0 {
			at, k := binary.Varint(b)
			if k <= 0 {
				return errors.New("malformed reply from the service")
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

func (r *remoteHistory) Tickets(fn func(id string, data []byte) error) error {
	return r.request(apiTicketsSubject, nil, func(b []byte) error {
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
