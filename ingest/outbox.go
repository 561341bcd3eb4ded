package ingest

import (
	"bytes"
	"context"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"net/url"
	"strconv"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/store"
)

// Outbox lanes: what a committed delivery goes to. Everything the
// service publishes about alerts is first stored in the outbox in the
// same transaction as the state it derives from, then sent, then deleted
// by a later commit; a crash in between sends it again, under the same
// id, so receivers can drop the repeat.
const (
	laneBus     byte = 'B' // alert events and tickets on NATS
	laneWebhook byte = 'W' // tickets posted to the webhook
	laneLegacy  byte = 0   // webhook posts stored by earlier versions
)

// HeaderIdempotency carries a ticket revision's id on webhook posts.
const HeaderIdempotency = "Idempotency-Key"

// Webhook configures the delivery of tickets over HTTP. The zero value
// delivers nothing.
type Webhook struct {
	// URL receives each ticket revision (opening, closing) as a JSON POST
	// with the Idempotency-Key header set to the revision's id. Empty:
	// no webhook.
	URL string
	// Authorization, if not empty, is sent as the Authorization header.
	Authorization string
	// Timeout bounds one POST. Default 10s.
	Timeout time.Duration
	// FirstRetry is the wait after the first failure; it doubles up to
	// MaxBackoff. Defaults 1s and 5m.
	FirstRetry, MaxBackoff time.Duration
}

// envelope is an outbox item of lane laneBus or laneWebhook: where it
// goes, the id receivers dedupe it by, and the payload.
type envelope struct {
	subject string // laneBus only
	id      string
	data    []byte
}

const envelopeVersion = 1

func appendEnvelope(dst []byte, e envelope) []byte {
	dst = append(dst, envelopeVersion)
	dst = binary.AppendUvarint(dst, uint64(len(e.subject)))
	dst = append(dst, e.subject...)
	dst = binary.AppendUvarint(dst, uint64(len(e.id)))
	dst = append(dst, e.id...)
	return append(dst, e.data...)
}

var errEnvelope = errors.New("ingest: outbox item unreadable")

func decodeEnvelope(b []byte) (envelope, error) {
	if len(b) == 0 || b[0] != envelopeVersion {
		return envelope{}, errEnvelope
	}
	b = b[1:]
	var e envelope
	for _, dst := range []*string{&e.subject, &e.id} {
		n, k := binary.Uvarint(b)
		if k <= 0 || n > uint64(len(b)-k) {
			return envelope{}, errEnvelope
		}
		*dst = string(b[k : k+int(n)])
		b = b[k+int(n):]
	}
	e.data = b
	return e, nil
}

// outbox sends committed deliveries and collects which were sent, for the
// committer to delete with its next commit: the committer stays the one
// writer of the DB.
type outbox struct {
	s      *Service
	log    zerolog.Logger
	client *http.Client

	mu       sync.Mutex
	queue    []store.OutboxItem // bus items committed, not yet sent
	inflight int                // bus items being sent
	done     []store.OutboxItem // sent, not yet deleted
	busWake  chan struct{}
	webWake  chan struct{}
}

func newOutbox(s *Service) *outbox {
	return &outbox{
		s: s, log: s.log.With().Str("component", "outbox").Logger(),
		client:  &http.Client{Timeout: s.o.Webhook.Timeout},
		busWake: make(chan struct{}, 1), webWake: make(chan struct{}, 1),
	}
}

// committed takes the outbox items a commit stored. Called by the
// committer.
func (o *outbox) committed(items []store.OutboxItem) {
	bus, web := false, false
	o.mu.Lock()
	for _, it := range items {
		switch it.Lane {
		case laneBus:
			o.queue = append(o.queue, it)
			bus = true
		case laneWebhook:
			web = true
		}
	}
	o.mu.Unlock()
	if bus {
		wake(o.busWake)
	}
	if web {
		wake(o.webWake)
	}
}

// takeDone returns the items sent since the last call. Called by the
// committer.
func (o *outbox) takeDone() []store.OutboxItem {
	o.mu.Lock()
	defer o.mu.Unlock()
	d := o.done
	o.done = nil
	return d
}

// flushed waits until every bus item committed so far is sent, or
// timeout passes; it reports whether they were.
func (o *outbox) flushed(timeout time.Duration) bool {
	deadline := time.Now().Add(timeout)
	for {
		o.mu.Lock()
		idle := len(o.queue) == 0 && o.inflight == 0
		o.mu.Unlock()
		if idle {
			return true
		}
		if time.Now().After(deadline) {
			o.log.Warn().Dur("waited", timeout).Msg("alert events and tickets left unsent; sent at the next start")
			return false
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// pendingDone reports whether sent items wait to be deleted.
func (o *outbox) pendingDone() bool {
	o.mu.Lock()
	defer o.mu.Unlock()
	return len(o.done) > 0
}

func (o *outbox) sent(it store.OutboxItem) {
	o.mu.Lock()
	o.done = append(o.done, store.OutboxItem{Lane: it.Lane, Seq: it.Seq})
	o.mu.Unlock()
}

func wake(c chan struct{}) {
	select {
	case c <- struct{}{}:
	default:
	}
}

// loadLeft queues what a previous run left unsent in the outbox. Run
// calls it before the first commit, so nothing is queued twice.
func (o *outbox) loadLeft() error {
	left, err := o.s.o.DB.Outbox(laneBus, 0, 1<<30)
	var skipped *store.SkippedError
	switch {
	case errors.As(err, &skipped):
		// The damaged items cannot be sent; the good ones still are.
		o.log.Error().Err(err).Msg("outbox items damaged")
	case err != nil:
		return fmt.Errorf("ingest: outbox: %w", err)
	}
	if len(left) > 0 {
		o.log.Info().Int("n", len(left)).Msg("sending alert events and tickets left from before the restart")
		o.queue = append(left, o.queue...)
	}
	return nil
}

// runBus publishes committed alert events and tickets until ctx is done. A publication
// counts as sent once the server has it (a flush round trip); until then
// it is retried.
func (o *outbox) runBus(ctx context.Context) {
	backoff := 100 * time.Millisecond
	for {
		o.mu.Lock()
		batch := o.queue
		o.queue, o.inflight = nil, len(batch)
		o.mu.Unlock()
		n, err := o.publish(batch)
		o.mu.Lock()
		o.inflight = 0
		if err != nil {
			o.queue = append(batch[n:], o.queue...)
		}
		o.mu.Unlock()
		if err != nil {
			o.log.Warn().Err(err).Int("unsent", len(batch)-n).Dur("retry_in", backoff).Msg("alert publication failed")
			select {
			case <-ctx.Done():
				return
			case <-time.After(backoff):
			}
			backoff = min(2*backoff, 30*time.Second)
			continue
		}
		backoff = 100 * time.Millisecond
		select {
		case <-ctx.Done():
			return
		case <-o.busWake:
		}
	}
}

// publish sends the items and flushes; it returns how many were sent.
func (o *outbox) publish(items []store.OutboxItem) (int, error) {
	if len(items) == 0 {
		return 0, nil
	}
	nc := o.s.o.Conn
	for i, it := range items {
		e, err := decodeEnvelope(it.Data)
		if err != nil {
			o.log.Error().Err(err).Uint64("seq", it.Seq).Msg("outbox item dropped")
			o.sent(it)
			continue
		}
		msg := nats.NewMsg(e.subject)
		msg.Data = e.data
		msg.Header.Set(nats.MsgIdHdr, e.id)
		if err := nc.PublishMsg(msg); err != nil {
			return i, err
		}
		o.logPublished(e)
	}
	if err := nc.FlushTimeout(5 * time.Second); err != nil {
		return 0, fmt.Errorf("flush: %w", err)
	}
	for _, it := range items {
		o.sent(it)
	}
	return len(items), nil
}

// logPublished logs an alert event or ticket once it is on the bus.
func (o *outbox) logPublished(e envelope) {
	if e.subject == o.s.o.TicketSubject {
		var tk alert.Ticket
		if json.Unmarshal(e.data, &tk) == nil {
			o.log.Info().Str("sensor", tk.Sensor).Str("ticket", tk.ID).Time("due", tk.Due).Bool("closed", tk.Calibration != nil).
				Msg("recalibration ticket")
		}
		return
	}
	var ev alert.Event
	if json.Unmarshal(e.data, &ev) != nil {
		return
	}
	lvl := o.log.Info()
	if ev.Severity == alert.Critical {
		lvl = o.log.Warn()
	}
	lvl.Str("sensor", ev.Sensor).Str("window", ev.Window).Str("kind", ev.Kind.String()).Str("type", ev.Type.String()).
		Str("severity", ev.Severity.String()).Float64("value", ev.Value).Float64("limit", ev.Limit).Str("unit", ev.Unit).
		Msg("alert")
}

// runWebhook posts committed tickets to the webhook, oldest first,
// retrying with exponential backoff, until ctx is done. An item counts as
// sent only after the receiver answered 2xx, so none is lost while it is
// down; the Idempotency-Key lets the receiver drop a repeat after a crash.
func (o *outbox) runWebhook(ctx context.Context) {
	hook := o.s.o.Webhook
	if hook.URL == "" {
		return
	}
	backoff := hook.FirstRetry
	var after [256]uint64 // per lane: items up to this seq were posted
	for {
		failed, full := false, false
		for _, lane := range []byte{laneLegacy, laneWebhook} {
			items, err := o.s.o.DB.Outbox(lane, after[lane], 32)
			if err != nil {
				o.log.Error().Err(err).Msg("outbox read")
			}
			full = full || len(items) == 32
			for _, it := range items {
				if err := o.post(ctx, it); err != nil {
					o.log.Warn().Err(err).Str("url", redactURL(hook.URL)).Dur("retry_in", backoff).Msg("ticket delivery failed")
					failed = true
					break
				}
				after[lane] = it.Seq
				o.sent(it)
			}
			if failed {
				break
			}
		}
		wait := time.Hour
		switch {
		case failed:
			wait = backoff
			backoff = min(2*backoff, hook.MaxBackoff)
		case full:
			wait = 0
		default:
			backoff = hook.FirstRetry
		}
		select {
		case <-ctx.Done():
			return
		case <-o.webWake:
		case <-time.After(wait):
		}
	}
}

func (o *outbox) post(ctx context.Context, it store.OutboxItem) error {
	e := envelope{id: "outbox-" + strconv.FormatUint(it.Seq, 10), data: it.Data}
	if it.Lane != laneLegacy {
		var err error
		if e, err = decodeEnvelope(it.Data); err != nil {
			o.log.Error().Err(err).Uint64("seq", it.Seq).Msg("outbox item dropped")
			return nil
		}
	}
	hook := o.s.o.Webhook
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, hook.URL, bytes.NewReader(e.data))
	if err != nil {
		return err
	}
	req.Header.Set("Content-Type", "application/json")
	req.Header.Set(HeaderIdempotency, e.id)
	if hook.Authorization != "" {
		req.Header.Set("Authorization", hook.Authorization)
	}
	resp, err := o.client.Do(req)
	if err != nil {
		var ue *url.Error
		if errors.As(err, &ue) {
			err = ue.Err // the URL may carry a token: said once, redacted, by the caller
		}
		return err
	}
	resp.Body.Close()
	if resp.StatusCode/100 != 2 {
		return fmt.Errorf("receiver answered %s", resp.Status)
	}
	return nil
}

// redactURL returns u without its user information and query values,
// which may hold credentials.
func redactURL(u string) string {
	p, err := url.Parse(u)
	if err != nil {
		return "(unparsable URL)"
	}
	p.User = nil
	if p.RawQuery != "" {
		p.RawQuery = "redacted"
	}
	return p.String()
}
