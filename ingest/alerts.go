package ingest

import (
	"encoding/binary"
	"encoding/json"
	"errors"
	"strconv"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
	"driftfit/store"
)

// peerKey is the suffix of the stored alert state of a member's peer
// rule, judged on its deviation from its group.
const peerKey = "~peers"

// alertEntry is one alert tracker of a sensor: its own rule's, or its
// peer rule's. The sensor's worker owns it.
type alertEntry struct {
	key      string // store key of its state: the id, or id + peerKey
	tr       *alert.Tracker
	lastEval map[rolling.WindowSpec]int64 // newest fit time evaluated, Unix ns
	// ticketKinds (peer rule only) are the kinds whose attributed raise
	// opens a ticket: those of the member's own rule. The peer rule
	// itself opens none (see peerGroup).
	ticketKinds []alert.Kind
}

// alertState is the alert side of a sensor's state; the sensor's worker
// owns it. made[i] says entry[i] was looked up (it may still be nil: no
// rule); index 0 is the own rule, 1 the peer rule.
type alertState struct {
	made  [2]bool
	entry [2]*alertEntry
	// det holds the step and data-quality detectors of the own rule;
	// nil when it sets none. detMade says it was looked up.
	det     *detectState
	detMade bool
}

// entry returns the sensor's tracker (peer: its peer rule's), making it
// from the rule and any stored state on first use; nil when the sensor
// has no rule.
func (w *worker) entry(ref *sensorRef, peer bool) *alertEntry {
	i := 0
	if peer {
		i = 1
	}
	as := &ref.st.alerts
	if as.made[i] {
		return as.entry[i]
	}
	as.made[i] = true
	rule := w.s.o.Rule
	if rule == nil {
		return nil
	}
	r, ok := rule(ref.id)
	if !ok {
		return nil
	}
	key := ref.id
	var tk []alert.Kind
	if peer {
		key += peerKey
		if ref.st.member != nil {
			r.Class += " vs peer group " + ref.st.member.g.name
		}
		// The deviation from the peers starts at zero by construction:
		// the tolerance band is centred there, whatever the as-left.
		r.AsLeft, r.HasAsLeft = 0, true
		// Tickets follow attribution, not a raise (see peerGroup); the
		// detectors run on the member's own readings.
		tk = ownTicketKinds(r.TicketKinds)
		r.TicketKinds = []alert.Kind{}
		r.Detect = alert.Detectors{}
	}
	tr, err := alert.NewTracker(ref.id, r)
	if err != nil {
		w.s.log.Warn().Str("sensor", ref.id).Err(err).Msg("alert rule refused")
		return nil
	}
	e := &alertEntry{key: key, tr: tr, lastEval: map[rolling.WindowSpec]int64{}, ticketKinds: tk}
	if st, ok := w.s.savedAlerts[key]; ok {
		if err := e.decode(st); err != nil {
			w.s.log.Warn().Str("sensor", ref.id).Err(err).Msg("stored alert state unreadable; starting afresh")
			tr, _ = alert.NewTracker(ref.id, r)
			e = &alertEntry{key: key, tr: tr, lastEval: map[rolling.WindowSpec]int64{}, ticketKinds: tk}
		}
	}
	as.entry[i] = e
	return e
}

// judge evaluates a window's new solution against the sensor's rule (or,
// peer, its peer rule). The fit's newest reading time is the evaluation
// time, so a replay judges the data as it happened, and a restart from
// the stored position makes the same decisions again.
func (w *worker) judge(ref *sensorRef, peer bool, sol *rolling.Solution) {
	e := w.entry(ref, peer)
	if e == nil || sol.N == 0 {
		return
	}
	last := sol.Last.UnixNano()
	if last <= e.lastEval[sol.Window] {
		return // judged before a restart
	}
	d, err := e.tr.Evaluate(sol.Last, sol)
	if errors.Is(err, alert.ErrUnknownWindow) || errors.Is(err, alert.ErrStale) {
		return
	}
	if err != nil {
		w.s.badLog.Warn().Str("sensor", ref.id).Err(err).Msg("alert evaluation")
		return
	}
	e.lastEval[sol.Window] = last
	w.judged(ref, e, d.Judgement)
	w.decided(ref, e, d)
}

// judgePeer evaluates a member's deviation window, with usable members
// in the bucket's reference, and reports whether it was judged.
func (w *worker) judgePeer(ref *sensorRef, sol *rolling.Solution, usable int) bool {
	e := w.entry(ref, true)
	if e == nil || sol.N == 0 {
		return false
	}
	last := sol.Last.UnixNano()
	if last <= e.lastEval[sol.Window] {
		return false // judged before a restart
	}
	// Two usable members are the least that make a reference other than
	// the member itself.
	d, err := e.tr.EvaluatePeers(sol.Last, sol, usable, 2)
	if errors.Is(err, alert.ErrUnknownWindow) || errors.Is(err, alert.ErrStale) {
		return false
	}
	if err != nil {
		w.s.badLog.Warn().Str("sensor", ref.id).Err(err).Msg("peer alert evaluation")
		return false
	}
	e.lastEval[sol.Window] = last
	w.judged(ref, e, d.Judgement)
	w.decided(ref, e, d)
	return d.Judgement.OK()
}

// ownTicketKinds returns the kinds whose raise opens a ticket under a
// rule with TicketKinds tk: tk itself, or Slope and LeadTime when nil
// (alert.Rule.TicketKinds).
func ownTicketKinds(tk []alert.Kind) []alert.Kind {
	if tk == nil {
		return []alert.Kind{alert.Slope, alert.LeadTime}
	}
	return append([]alert.Kind{}, tk...)
}

// decided queues the entry's new state and the decision's events,
// tickets and deliveries for the commit that stores the sensor.
func (w *worker) decided(ref *sensorRef, e *alertEntry, d alert.Decision) {
	state, err := e.encode()
	if err != nil {
		w.s.log.Error().Str("sensor", e.key).Err(err).Msg("alert state not encoded")
		return
	}
	out := store.AlertWrite{Sensor: e.key, State: state}
	for _, ev := range d.Events {
		data, err := json.Marshal(ev)
		if err != nil {
			w.s.log.Error().Str("sensor", e.key).Err(err).Msg("event not encoded")
			continue
		}
		out.Events = append(out.Events, store.TimedValue{At: ev.At, Data: data})
		out.Outbox = append(out.Outbox, store.OutboxItem{Lane: laneBus, Data: appendEnvelope(nil, envelope{
			subject: w.s.alertPrefix + ev.Sensor, id: eventID(&ev), data: data,
		})})
	}
	for _, tk := range []*alert.Ticket{d.Opened, d.Revised, d.Closed, d.Reopened} {
		if tk == nil {
			continue
		}
		data, err := json.Marshal(tk)
		if err != nil {
			w.s.log.Error().Str("sensor", e.key).Err(err).Msg("ticket not encoded")
			continue
		}
		w.s.tickets.set(tk)
		if out.Tickets == nil {
			out.Tickets = map[string][]byte{}
		}
		out.Tickets[tk.ID] = data
		id := ticketRevisionID(tk)
		out.Outbox = append(out.Outbox, store.OutboxItem{Lane: laneBus, Data: appendEnvelope(nil, envelope{
			subject: w.s.o.TicketSubject, id: id, data: data,
		})})
		if w.s.o.Webhook.URL != "" {
			out.Outbox = append(out.Outbox, store.OutboxItem{Lane: laneWebhook, Data: appendEnvelope(nil, envelope{id: id, data: data})})
		}
	}
	st := ref.st
	st.outs = append(st.outs, out)
	w.mark(ref)
	if len(out.Outbox) > 0 {
		st.urgent = true
		w.s.urge()
	}
}

// eventID names an event for deduplication (Nats-Msg-Id): one
// evaluation of a sensor's window yields at most one event of a kind.
func eventID(ev *alert.Event) string {
	return "ev|" + ev.Sensor + "|" + ev.Class + "|" + ev.Window + "|" + ev.Kind.String() + "|" + ev.Type.String() + "|" +
		strconv.FormatInt(ev.At.UnixNano(), 10)
}

// ticketRevisionID names one revision of a ticket (its opening, each
// revision of its due date, its closing, a reopening or a closing
// amended) for deduplication: Nats-Msg-Id on the bus, Idempotency-Key
// for the webhook. Every amendment counts up the revision, so a closing
// after one is told from the first by its revision.
func ticketRevisionID(tk *alert.Ticket) string {
	switch {
	case tk.Calibration != nil && len(tk.Amendments) > 0:
		return "tk|" + tk.ID + "|closed|r" + strconv.Itoa(tk.Revision)
	case tk.Calibration != nil:
		return "tk|" + tk.ID + "|closed"
	case tk.Revision == 0:
		return "tk|" + tk.ID + "|opened"
	}
	return "tk|" + tk.ID + "|r" + strconv.Itoa(tk.Revision)
}

// calibrate applies a calibration to the sensor's trackers (its own
// rule's and, for a peer-group member, its peer rule's), which closes its
// open ticket, and returns the trackers' prior states and the ids of the
// tickets closed. A sensor without a rule has nothing to apply.
func (w *worker) calibrate(ref *sensorRef, c alert.Calibration) (calUndo, []string, error) {
	var undo calUndo
	var closed []string
	for i, peer := range []bool{false, true} {
		if peer && ref.st.member == nil {
			if _, stored := w.s.savedAlerts[ref.id+peerKey]; !stored {
				continue
			}
		}
		e := w.entry(ref, peer)
		if e == nil {
			continue
		}
		cc := c
		if i == 1 {
			cc.AsLeft = 0 // the peer deviation restarts from zero
		}
		d, err := e.tr.Calibrate(cc)
		if err != nil {
			return undo, nil, err
		}
		if peer {
			undo.Peer = d.Prior
		} else {
			undo.Own = d.Prior
		}
		if d.Closed != nil {
			closed = append(closed, d.Closed.ID)
		}
		w.decided(ref, e, d)
	}
	w.calibrated(ref)
	return undo, closed, nil
}

// encode stores the evaluation marks with the tracker's state, so that a
// pane close replayed after a restart is not judged twice.
func (e *alertEntry) encode() ([]byte, error) {
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

func (e *alertEntry) decode(b []byte) error {
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

// urge asks the dispatcher to commit as soon as the committer is free: a
// decision waits in a worker. Safe from any goroutine.
func (s *Service) urge() { wake(s.wakeCommit) }
