package main

import (
	"bytes"
	"context"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"os"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// alerter evaluates each sensor's alert rule whenever one of its panes
// closes, stores the outcome, publishes alert events and recalibration
// tickets on the bus, and posts tickets to a webhook from a stored outbox.
//
// Evaluation runs on the ingest worker that owns the sensor; the tracker
// of a sensor is also reached by calibration events, so each carries a
// mutex. Lock order: alerter.mu, then trackerEntry.mu.
type alerter struct {
	cfg           *configs.Config
	nc            *nats.Conn
	db            *store.DB
	log           zerolog.Logger
	alertPrefix   string
	ticketSubject string
	webhook       webhookOptions

	mu       sync.Mutex
	trackers map[string]*trackerEntry // nil entry value: the sensor has no rule
	saved    map[string][]byte        // stored states not yet loaded

	writes chan alertWrite
	wake   chan struct{} // outbox has new items

	// peers, if set, judges peer-group members on their deviation from
	// the group while the group has two live members.
	peers *peers
	// restart, if set, restarts a sensor's fits from a calibration's time.
	restart func(ctx context.Context, id string, from time.Time) error
}

// peerKey is the suffix of the tracker key (and stored state) of a
// member's peer rule, judged on its deviation from its group.
const peerKey = "~peers"

type trackerEntry struct {
	mu       sync.Mutex
	tr       *alert.Tracker
	lastEval map[rolling.WindowSpec]int64 // newest fit time evaluated, Unix ns
}

// alertWrite is one evaluation's result on its way to the store and bus.
type alertWrite struct {
	w      store.AlertWrite
	events []alert.Event
	ticket []*alert.Ticket
}

// webhookOptions configure ticket delivery over HTTP.
type webhookOptions struct {
	url        string
	timeout    time.Duration
	maxBackoff time.Duration
	header     string        // Authorization header value, if any
	firstRetry time.Duration // first backoff; default 1s
}

func newAlerter(cfg *configs.Config, nc *nats.Conn, db *store.DB, log zerolog.Logger, hook webhookOptions) (*alerter, error) {
	if hook.timeout <= 0 {
		hook.timeout = 10 * time.Second
	}
	if hook.maxBackoff <= 0 {
		hook.maxBackoff = 5 * time.Minute
	}
	if hook.firstRetry <= 0 {
		hook.firstRetry = time.Second
	}
	a := &alerter{
		cfg: cfg, nc: nc, db: db, log: log.With().Str("component", "alert").Logger(),
		alertPrefix: cfg.Bus.AlertSubjectPrefix, ticketSubject: cfg.Bus.TicketSubject, webhook: hook,
		trackers: map[string]*trackerEntry{}, saved: map[string][]byte{},
		writes: make(chan alertWrite, 1024), wake: make(chan struct{}, 1),
	}
	err := db.AlertStates(func(id string, state []byte) error {
		a.saved[id] = bytes.Clone(state)
		return nil
	})
	// The caution travels in every event and ticket; the log says it once.
	a.log.Info().Str("caution", alert.Caution).Msg("alert rules active")
	return a, err
}

// ruleFor maps a sensor's class onto an alert rule; ok is false for a
// sensor with no class, or a class without a tolerance or limit.
func ruleFor(cfg *configs.Config, id string) (alert.Rule, bool, error) {
	c, err := cfg.ClassFor(id)
	if errors.Is(err, configs.ErrNoClass) {
		return alert.Rule{}, false, nil
	}
	if err != nil {
		return alert.Rule{}, false, err
	}
	r := alert.DefaultRule()
	r.Class, r.Unit = c.Name, c.Unit
	r.SpanLower, r.SpanUpper = c.Span.Lower, c.Span.Upper
	r.Tolerance = c.Tolerance.Abs
	r.AsLeft, r.HasAsLeft = c.AsLeft, c.HasAsLeft
	r.Windows = nil
	for _, w := range c.Windows {
		r.Windows = append(r.Windows, rolling.WindowSpec{Span: w.Span, Pane: w.Pane})
	}
	if c.TrendModel == configs.TrendParabola {
		r.TrendModel = rolling.Parabola
	}
	r.MinReadings, r.MinCoverage, r.Debounce = c.MinReadings, c.MinCoverage, c.Debounce
	r.ClearFraction, r.Cooldown = c.ClearFraction, c.Cooldown
	r.Limits = alert.Limits{
		Slope:     alert.RateLimit{Warning: c.Limits.Slope.Warning.Value, Critical: c.Limits.Slope.Critical.Value},
		Curvature: alert.RateLimit{Warning: c.Limits.Curvature.Warning.Value, Critical: c.Limits.Curvature.Critical.Value},
		Doubling:  alert.DurationLimit{Warning: c.Limits.DoublingTime.Warning, Critical: c.Limits.DoublingTime.Critical},
		LeadTime:  alert.DurationLimit{Warning: c.Limits.LeadTime.Warning, Critical: c.Limits.LeadTime.Critical},
	}
	on := r.Limits.Slope.On() || r.Limits.Curvature.On() || r.Limits.Doubling.On() || r.Limits.LeadTime.On()
	return r, on && r.Tolerance > 0, nil
}

// entry returns the tracker entry under key for sensor id, making it
// (from the stored state if any) on first use; nil when the sensor has
// no rule. A non-empty group marks the member's peer rule, judged on its
// deviation from the group; its events say so in their class.
func (a *alerter) entry(key, id, group string) *trackerEntry {
	a.mu.Lock()
	defer a.mu.Unlock()
	if e, ok := a.trackers[key]; ok {
		return e
	}
	var e *trackerEntry
	r, ok, err := ruleFor(a.cfg, id)
	if err != nil {
		a.log.Warn().Str("sensor", id).Err(err).Msg("no alert rule")
	}
	if group != "" {
		r.Class += " vs peer group " + group
		// The deviation from the peers starts at zero by construction:
		// the tolerance band is centred there, whatever the as-left.
		r.AsLeft, r.HasAsLeft = 0, true
	}
	if ok {
		tr, err := alert.NewTracker(id, r)
		if err != nil {
			a.log.Warn().Str("sensor", id).Err(err).Msg("alert rule refused")
		} else {
			e = &trackerEntry{tr: tr, lastEval: map[rolling.WindowSpec]int64{}}
			if st, ok := a.saved[key]; ok {
				if err := e.decode(st); err != nil {
					a.log.Warn().Str("sensor", id).Err(err).Msg("stored alert state unreadable; starting afresh")
					tr, _ = alert.NewTracker(id, r)
					e = &trackerEntry{tr: tr, lastEval: map[rolling.WindowSpec]int64{}}
				}
				delete(a.saved, key)
			}
		}
	}
	a.trackers[key] = e
	return e
}

// encode stores the evaluation marks with the tracker's state, so that a
// pane close replayed after a crash is not judged twice.
func (e *trackerEntry) encode() ([]byte, error) {
	st, err := e.tr.MarshalBinary()
	if err != nil {
		return nil, err
	}
	b := binary.AppendUvarint(nil, uint64(len(e.lastEval)))
	for w, t := range e.lastEval {
		b = binary.AppendUvarint(b, uint64(w.Span))
		b = binary.AppendUvarint(b, uint64(w.Pane))
		b = binary.AppendVarint(b, t)
	}
	return append(b, st...), nil
}

func (e *trackerEntry) decode(b []byte) error {
	n, k := binary.Uvarint(b)
	if k <= 0 || n > 64 {
		return errors.New("bad evaluation marks")
	}
	b = b[k:]
	for range n {
		span, k1 := binary.Uvarint(b)
		if k1 <= 0 {
			return errors.New("bad evaluation mark")
		}
		pane, k2 := binary.Uvarint(b[k1:])
		if k2 <= 0 {
			return errors.New("bad evaluation mark")
		}
		t, k3 := binary.Varint(b[k1+k2:])
		if k3 <= 0 {
			return errors.New("bad evaluation mark")
		}
		e.lastEval[rolling.WindowSpec{Span: time.Duration(span), Pane: time.Duration(pane)}] = t
		b = b[k1+k2+k3:]
	}
	return e.tr.UnmarshalBinary(b)
}

// paneClosed is the ingest hook: judge the window's new solution. The
// fit's newest reading time is the evaluation time, so a replay of old
// data judges it as it happened.
func (a *alerter) paneClosed(id string, _ int, sol *rolling.Solution) {
	if a.peers != nil && a.peers.comparing(id) {
		return // judged on its deviation from the group instead
	}
	a.evaluate(id, id, "", sol)
}

// evaluatePeers judges a member's deviation from its peer group.
func (a *alerter) evaluatePeers(id, group string, sol *rolling.Solution) {
	a.evaluate(id+peerKey, id, group, sol)
}

func (a *alerter) evaluate(key, id, group string, sol *rolling.Solution) {
	e := a.entry(key, id, group)
	if e == nil || sol.N == 0 {
		return
	}
	e.mu.Lock()
	defer e.mu.Unlock()
	last := sol.Last.UnixNano()
	if last <= e.lastEval[sol.Window] {
		return // judged before a restart
	}
	d, err := e.tr.Evaluate(sol.Last, sol)
	if errors.Is(err, alert.ErrUnknownWindow) || errors.Is(err, alert.ErrStale) {
		return
	}
	if err != nil {
		a.log.Warn().Str("sensor", id).Err(err).Msg("alert evaluation")
		return
	}
	e.lastEval[sol.Window] = last
	a.submit(key, e, d)
}

// submit queues the entry's state (stored under key) and the decision's
// events and tickets. The caller holds e.mu.
func (a *alerter) submit(key string, e *trackerEntry, d alert.Decision) {
	st, err := e.encode()
	if err != nil {
		a.log.Error().Str("sensor", key).Err(err).Msg("alert state not encoded")
		return
	}
	w := alertWrite{w: store.AlertWrite{Sensor: key, State: st}, events: d.Events}
	for _, ev := range d.Events {
		data, err := json.Marshal(ev)
		if err != nil {
			a.log.Error().Str("sensor", key).Err(err).Msg("event not encoded")
			continue
		}
		w.w.Events = append(w.w.Events, store.TimedValue{At: ev.At, Data: data})
	}
	for _, tk := range []*alert.Ticket{d.Opened, d.Closed} {
		if tk == nil {
			continue
		}
		data, err := json.Marshal(tk)
		if err != nil {
			a.log.Error().Str("sensor", key).Err(err).Msg("ticket not encoded")
			continue
		}
		if w.w.Tickets == nil {
			w.w.Tickets = map[string][]byte{}
		}
		w.w.Tickets[tk.ID] = data
		if a.webhook.url != "" {
			w.w.Outbox = append(w.w.Outbox, store.OutboxItem{Lane: 1, Data: data})
		}
		w.ticket = append(w.ticket, tk)
	}
	a.writes <- w
}

// calibrate records a calibration: it applies it to the sensor's
// trackers (its own rule's and, for a peer-group member, its peer rule's),
// which closes the open ticket, then restarts the sensor's fits from the
// calibration's time. A sensor without alert rule still has its fits
// restarted.
func (a *alerter) calibrate(id string, c alert.Calibration) error {
	var entries []*trackerEntry
	var keys []string
	if e := a.entry(id, id, ""); e != nil {
		entries, keys = append(entries, e), append(keys, id)
	}
	a.mu.Lock()
	if pe := a.trackers[id+peerKey]; pe != nil {
		entries, keys = append(entries, pe), append(keys, id+peerKey)
	}
	a.mu.Unlock()
	for i, e := range entries {
		cc := c
		if keys[i] != id {
			cc.AsLeft = 0 // the peer deviation restarts from zero
		}
		e.mu.Lock()
		d, err := e.tr.Calibrate(cc)
		if err == nil {
			a.submit(keys[i], e, d)
		}
		e.mu.Unlock()
		if err != nil {
			return err
		}
	}
	if a.restart != nil {
		ctx, cancel := context.WithTimeout(context.Background(), apiTimeout)
		defer cancel()
		if err := a.restart(ctx, id, c.Time); err != nil {
			return fmt.Errorf("restart fits: %w", err)
		}
	}
	a.log.Info().Str("sensor", id).Float64("as_found", c.AsFound).Float64("as_left", c.AsLeft).Time("at", c.Time).
		Bool("alert_rule", len(entries) > 0).Msg("calibration recorded")
	return nil
}

// run stores queued results in batches, then publishes them, until ctx is
// done and the queue is drained.
func (a *alerter) run(ctx context.Context) {
	// Results are written as soon as they come, with whatever else queued
	// meanwhile: an alert waits only for the write before it, and a burst
	// of pane closes still shares a few transactions.
	const maxBatch = 512
	var batch []alertWrite
	flush := func() {
		if len(batch) == 0 {
			return
		}
		ws := make([]store.AlertWrite, len(batch))
		outbox := false
		for i := range batch {
			ws[i] = batch[i].w
			outbox = outbox || len(batch[i].w.Outbox) > 0
		}
		if err := a.db.WriteAlerts(ws); err != nil {
			a.log.Error().Err(err).Msg("alert results not stored")
		}
		for _, w := range batch {
			a.publish(w)
		}
		batch = batch[:0]
		if outbox {
			select {
			case a.wake <- struct{}{}:
			default:
			}
		}
	}
	// take adds what is queued now, up to maxBatch, without waiting.
	take := func() {
		for len(batch) < maxBatch {
			select {
			case w := <-a.writes:
				batch = append(batch, w)
				continue
			default:
			}
			return
		}
	}
	for {
		select {
		case w := <-a.writes:
			batch = append(batch, w)
			take()
			flush()
		case <-ctx.Done():
			for {
				take()
				if len(batch) == 0 {
					return
				}
				flush()
			}
		}
	}
}

// publish sends events and tickets on the bus, after they were stored.
func (a *alerter) publish(w alertWrite) {
	for i, ev := range w.events {
		ev := ev
		lvl := a.log.Info()
		if ev.Severity == alert.Critical {
			lvl = a.log.Warn()
		}
		lvl.Str("sensor", ev.Sensor).Str("window", ev.Window).Str("kind", ev.Kind.String()).Str("type", ev.Type.String()).
			Str("severity", ev.Severity.String()).Float64("value", ev.Value).Float64("limit", ev.Limit).Str("unit", ev.Unit).
			Msg("alert")
		if err := a.nc.Publish(a.alertPrefix+"."+ev.Sensor, w.w.Events[i].Data); err != nil {
			a.log.Warn().Err(err).Str("sensor", ev.Sensor).Msg("alert not published")
		}
	}
	for _, tk := range w.ticket {
		data := w.w.Tickets[tk.ID]
		a.log.Info().Str("sensor", tk.Sensor).Str("ticket", tk.ID).Time("due", tk.Due).Bool("closed", tk.Calibration != nil).
			Msg("recalibration ticket")
		if err := a.nc.Publish(a.ticketSubject, data); err != nil {
			a.log.Warn().Err(err).Str("ticket", tk.ID).Msg("ticket not published")
		}
	}
}

// deliver posts outbox items to the webhook, oldest first, retrying with
// exponential backoff, until ctx is done. An item leaves the outbox only
// after the receiver answered 2xx, so none is lost while it is down.
func (a *alerter) deliver(ctx context.Context) {
	if a.webhook.url == "" {
		return
	}
	client := &http.Client{Timeout: a.webhook.timeout}
	backoff := a.webhook.firstRetry
	for {
		items, err := a.db.Outbox(1, 0, 32)
		if err != nil {
			a.log.Error().Err(err).Msg("outbox read")
		}
		failed := false
		for _, it := range items {
			if err := a.post(ctx, client, it.Data); err != nil {
				a.log.Warn().Err(err).Str("url", a.webhook.url).Dur("retry_in", backoff).Msg("ticket delivery failed")
				failed = true
				break
			}
			if err := a.db.OutboxDone(1, it.Seq); err != nil {
				a.log.Error().Err(err).Msg("outbox update")
			}
		}
		wait := time.Hour
		switch {
		case failed:
			wait = backoff
			backoff = min(2*backoff, a.webhook.maxBackoff)
		case len(items) == 32:
			wait = 0
		default:
			backoff = a.webhook.firstRetry
		}
		select {
		case <-ctx.Done():
			return
		case <-a.wake:
		case <-time.After(wait):
		}
	}
}

func (a *alerter) post(ctx context.Context, client *http.Client, body []byte) error {
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, a.webhook.url, bytes.NewReader(body))
	if err != nil {
		return err
	}
	req.Header.Set("Content-Type", "application/json")
	if a.webhook.header != "" {
		req.Header.Set("Authorization", a.webhook.header)
	}
	resp, err := client.Do(req)
	if err != nil {
		return err
	}
	resp.Body.Close()
	if resp.StatusCode/100 != 2 {
		return fmt.Errorf("receiver answered %s", resp.Status)
	}
	return nil
}

// calibrationMsg is the payload of a calibration event on
// <calibration prefix>.<sensor id>.
type calibrationMsg struct {
	T       string  `json:"t"` // RFC 3339 or Unix seconds; empty: when received
	AsFound float64 `json:"as_found"`
	AsLeft  float64 `json:"as_left"`
}

// subscribeCalibrations applies calibration events from the bus. The
// returned function unsubscribes.
func (a *alerter) subscribeCalibrations(prefix string) (func(), error) {
	sub, err := a.nc.Subscribe(prefix+".>", func(m *nats.Msg) {
		id := m.Subject[len(prefix)+1:]
		reply := func(err error) {
			if m.Reply == "" {
				return
			}
			ans := []byte(`{"ok":true}`)
			if err != nil {
				ans, _ = json.Marshal(map[string]string{"error": err.Error()})
			}
			_ = a.nc.Publish(m.Reply, ans)
		}
		var c calibrationMsg
		if err := json.Unmarshal(m.Data, &c); err != nil {
			a.log.Warn().Str("subject", m.Subject).Err(err).Msg("calibration event refused")
			reply(fmt.Errorf("payload: %w", err))
			return
		}
		at := time.Now()
		if c.T != "" {
			ns, err := ingest.ParseTime([]byte(c.T))
			if err != nil {
				reply(fmt.Errorf("t: %w", err))
				return
			}
			at = time.Unix(0, ns)
		}
		err := a.calibrate(id, alert.Calibration{Time: at, AsFound: c.AsFound, AsLeft: c.AsLeft})
		if err != nil {
			a.log.Warn().Str("sensor", id).Err(err).Msg("calibration event refused")
		}
		reply(err)
	})
	if err != nil {
		return nil, err
	}
	return func() { _ = sub.Unsubscribe() }, nil
}

// webhookFromConfig returns the ticket webhook settings of the
// configuration, reading the Authorization header value from the
// environment variable it names.
func webhookFromConfig(cfg *configs.Config) webhookOptions {
	w := cfg.Tickets.Webhook
	o := webhookOptions{url: w.URL, timeout: w.Timeout, maxBackoff: w.MaxBackoff}
	if w.HeaderEnv != "" {
		o.header = os.Getenv(w.HeaderEnv)
	}
	return o
}
