package readapi

import (
	"encoding/binary"
	"encoding/json"
	"fmt"
	"path/filepath"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/rolling"
	"driftfit/store"
)

// Serve answers identity, history, sensor-list, event, ticket and
// calibration-record requests from db
// on nc until the returned stop is called; stop unsubscribes. Handlers
// run on nc's delivery goroutine, each inside one read transaction of db.
// A request whose reply subject lies under the API's own subjects or
// under one of own (the service's other subjects) gets no answer:
// answering there would let a client publish where NATS permissions may
// not let it.
func Serve(nc *nats.Conn, db *store.DB, log zerolog.Logger, own ...string) (stop func(), err error) {
	log = log.With().Str("component", "api").Logger()
	own = append(own, strings.TrimSuffix(HistorySubject, ".history"))
	send := func(m *nats.Msg, data []byte, more bool, err error) {
		for _, p := range own {
			if m.Reply == p || strings.HasPrefix(m.Reply, p+".") {
				log.Warn().Str("subject", m.Subject).Str("reply", m.Reply).Msg("reply onto the service's own subjects refused")
				return
			}
		}
		out := nats.NewMsg(m.Reply)
		out.Data = data
		if more {
			out.Header.Set(HeaderMore, "1")
		}
		if err != nil {
			out.Header.Set(HeaderError, err.Error())
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
			if len(buf) >= ChunkBytes {
				send(m, buf, true, nil)
				buf = buf[:0]
			}
			return nil
		})
		send(m, buf, false, err)
	}
	request := func(m *nats.Msg) (Request, bool) {
		var q Request
		if err := json.Unmarshal(m.Data, &q); err != nil {
			send(m, nil, false, fmt.Errorf("bad request: %w", err))
			return q, false
		}
		return q, true
	}
	ident, err := json.Marshal(Identity{Path: CanonicalPath(db.Path())})
	if err != nil {
		return nil, err
	}
	handlers := map[string]nats.MsgHandler{
		IdentitySubject: func(m *nats.Msg) { send(m, ident, false, nil) },
		HistorySubject: func(m *nats.Msg) {
			q, ok := request(m)
			if !ok {
				return
			}
			since, until := q.Times()
			window := rolling.WindowSpec{Span: time.Duration(q.SpanNs), Pane: time.Duration(q.PaneNs)}
			reply(m, func(add func(func([]byte) ([]byte, error)) error) error {
				return db.History(q.Sensor, window, since, until, func(r store.HistoryRecord) error {
					return add(func(b []byte) ([]byte, error) { return store.AppendHistoryRecord(b, &r) })
				})
			})
		},
		SensorsSubject: func(m *nats.Msg) {
			reply(m, func(add func(func([]byte) ([]byte, error)) error) error {
				return db.HistorySensors(func(id string) error {
					return add(func(b []byte) ([]byte, error) { return append(append(b, id...), '\n'), nil })
				})
			})
		},
		EventsSubject: func(m *nats.Msg) {
			q, ok := request(m)
			if !ok {
				return
			}
			since, until := q.Times()
			reply(m, func(add func(func([]byte) ([]byte, error)) error) error {
				return db.Events(since, until, func(at time.Time, data []byte) error {
					return add(func(b []byte) ([]byte, error) {
						return appendFrame(binary.AppendVarint(b, at.UnixNano()), data), nil
					})
				})
			})
		},
		CalibrationsSubject: func(m *nats.Msg) {
			q, ok := request(m)
			if !ok {
				return
			}
			reply(m, func(add func(func([]byte) ([]byte, error)) error) error {
				return db.Calibrations(q.Sensor, func(id string, n uint64, data []byte) error {
					return add(func(b []byte) ([]byte, error) {
						return appendFrame(binary.AppendUvarint(appendFrame(b, []byte(id)), n), data), nil
					})
				})
			})
		},
		TicketsSubject: func(m *nats.Msg) {
			reply(m, func(add func(func([]byte) ([]byte, error)) error) error {
				return db.Tickets(func(id string, data []byte) error {
					return add(func(b []byte) ([]byte, error) { return appendFrame(appendFrame(b, []byte(id)), data), nil })
				})
			})
		},
	}
	var subs []*nats.Subscription
	stop = func() {
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

// CanonicalPath is path made absolute with its symbolic links resolved,
// as far as they resolve: two names of one file compare equal.
func CanonicalPath(path string) string {
	if abs, err := filepath.Abs(path); err == nil {
		path = abs
	}
	if real, err := filepath.EvalSymlinks(path); err == nil {
		path = real
	}
	return path
}

func appendFrame(dst, b []byte) []byte {
	return append(binary.AppendUvarint(dst, uint64(len(b))), b...)
}

// readFrame splits one frame off b.
func readFrame(b []byte) (frame, rest []byte, err error) {
	n, k := binary.Uvarint(b)
	if k <= 0 || n > uint64(len(b)-k) {
		return nil, nil, ErrMalformedReply
	}
	return b[k : k+int(n)], b[k+int(n):], nil
}
