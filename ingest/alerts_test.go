package ingest_test

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"driftfit/alert"
	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// ptRule is a transmitter class judged on the slope over 5 days of 6-hour
// panes.
func ptRule(tolerance float64, debounce int) alert.Rule {
	r := alert.DefaultRule()
	r.Class, r.Unit = "pt", "kPa"
	r.SpanLower, r.SpanUpper = 0, 2000
	r.Tolerance = tolerance
	r.Windows = []rolling.WindowSpec{{Span: 5 * 24 * time.Hour, Pane: 6 * time.Hour}}
	r.MinReadings, r.MinCoverage, r.Debounce = 20, 0.5, debounce
	r.Limits.Slope = alert.RateLimit{Warning: 0.5}
	return r
}

// startAlertService runs a service in stream mode that judges sensors by
// rule and puts the members of group (ids with the prefix) in one peer
// group.
func startAlertService(t *testing.T, url, dir string, rule alert.Rule, group string, edit func(*ingest.Options)) *harness {
	t.Helper()
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	o := ingest.Options{
		Conn: nc,
		DB:   db,
		Sensor: func(id string) (ingest.SensorConfig, error) {
			c := ingest.SensorConfig{Windows: rule.Windows, Unit: "kPa"}
			if group != "" && strings.HasPrefix(id, group) {
				c.Group = group
			}
			return c, nil
		},
		Rule:           func(string) (alert.Rule, bool) { return rule, true },
		CommitInterval: 20 * time.Millisecond,
	}
	if edit != nil {
		edit(&o)
	}
	svc, err := ingest.New(o)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	h := &harness{svc: svc, db: db, nc: nc, cancel: cancel, done: make(chan error, 1)}
	go func() { h.done <- svc.Run(ctx) }()
	t.Cleanup(h.stop)
	waitStream(t, nc)
	return h
}

// publishDrift publishes six days of hourly readings of id from t0 with
// a JetStream acknowledgement: 2 kPa/day of drift from 500 kPa in a
// repeating ±0.2 kPa pattern, four times ptRule's slope limit, enough for
// a slope alert and a ticket.
func publishDrift(t *testing.T, js nats.JetStreamContext, id string, t0 time.Time) {
	t.Helper()
	for hr := range 24 * 6 {
		publishJS(t, js, id, t0.Add(time.Duration(hr)*time.Hour), 500+2*float64(hr)/24+0.2*float64((hr*7919)%11-5)/5)
	}
}

// publishJS publishes one reading with a JetStream acknowledgement.
func publishJS(t *testing.T, js nats.JetStreamContext, id string, at time.Time, v float64) {
	t.Helper()
	data := ingest.AppendReading(nil, ingest.Decoded{Reading: rolling.Reading{UnixNano: at.UnixNano(), Value: v}})
	if _, err := js.Publish("driftfit.in."+id, data); err != nil {
		t.Fatal(err)
	}
}

// TestService_TicketThroughOutbox drives a drifting sensor until it raises
// a slope alert and opens a ticket, while the webhook receiver fails its
// first requests. The ticket must arrive once the receiver is back, be on
// the bus with a Nats-Msg-Id, and be stored; a calibration request is
// answered only once stored, closes the ticket, and the closing is
// delivered under another Idempotency-Key.
func TestService_TicketThroughOutbox(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()

	var mu sync.Mutex
	var got []alert.Ticket
	var keys []string
	fails := 3
	recv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		mu.Lock()
		defer mu.Unlock()
		if fails > 0 {
			fails--
			http.Error(w, "down for maintenance", http.StatusServiceUnavailable)
			return
		}
		body, _ := io.ReadAll(r.Body)
		var tk alert.Ticket
		if err := json.Unmarshal(body, &tk); err != nil {
			t.Errorf("webhook body %q: %v", body, err)
		}
		got = append(got, tk)
		keys = append(keys, r.Header.Get(ingest.HeaderIdempotency))
	}))
	defer recv.Close()

	h := startAlertService(t, ns.ClientURL(), dir, ptRule(5, 1), "", func(o *ingest.Options) {
		o.Webhook = ingest.Webhook{URL: recv.URL, FirstRetry: 20 * time.Millisecond}
	})
	tickets, err := h.nc.SubscribeSync("driftfit.tickets")
	if err != nil {
		t.Fatal(err)
	}
	events, err := h.nc.SubscribeSync("driftfit.alerts.>")
	if err != nil {
		t.Fatal(err)
	}
	if err := h.nc.Flush(); err != nil {
		t.Fatal(err)
	}
	js, err := h.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	id := "qm.u1.steam.pt-102"
	t0 := time.Date(2026, 9, 1, 0, 0, 0, 0, time.UTC)
	publishDrift(t, js, id, t0)
	m, err := tickets.NextMsg(20 * time.Second)
	if err != nil {
		t.Fatalf("no ticket on the bus: %v", err)
	}
	var onBus alert.Ticket
	if err := json.Unmarshal(m.Data, &onBus); err != nil || onBus.Sensor != id || onBus.Caution == "" {
		t.Fatalf("ticket on the bus: %+v, %v", onBus, err)
	}
	if mid := m.Header.Get(nats.MsgIdHdr); mid == "" {
		t.Error("ticket published without Nats-Msg-Id")
	}
	ev, err := events.NextMsg(5 * time.Second)
	if err != nil || ev.Header.Get(nats.MsgIdHdr) == "" {
		t.Fatalf("alert event %v (id %q), %v", ev, ev.Header.Get(nats.MsgIdHdr), err)
	}
	// Every post the receiver took; the opening first, then any revisions
	// of its due date.
	waitFor(t, "the ticket delivered after the outage", func() bool {
		mu.Lock()
		defer mu.Unlock()
		return len(got) >= 1
	})

	// The reply comes once the calibration is committed: the ticket is
	// closed in the file by then.
	reply, err := h.nc.Request("driftfit.calibrations."+id, []byte(`{"as_found": 511.9, "as_left": 500.1}`), 10*time.Second)
	var ans ingest.CalibrationReply
	if err != nil || json.Unmarshal(reply.Data, &ans) != nil || !ans.OK || ans.Record == nil || ans.Record.Seq != 1 || ans.Record.AsFound != 511.9 {
		t.Fatalf("calibration reply %v, %v; want ok with record 1", reply, err)
	}
	var stored alert.Ticket
	_ = h.db.Tickets(func(_ string, d []byte) error { return json.Unmarshal(d, &stored) })
	if stored.Calibration == nil || stored.Calibration.AsFound != 511.9 {
		t.Errorf("stored ticket when the reply came: %+v, want it closed with as-found 511.9", stored)
	}
	waitFor(t, "the closed ticket delivered", func() bool {
		mu.Lock()
		defer mu.Unlock()
		return len(got) >= 2 && got[len(got)-1].Calibration != nil
	})
	mu.Lock()
	opened, closed := got[0], got[len(got)-1]
	seen := map[string]bool{}
	for i, k := range keys {
		// Each revision (opening, due-date revisions, closing) has a key
		// of its own.
		if k == "" || seen[k] {
			t.Errorf("post %d (revision %d): Idempotency-Key %q empty or repeated", i, got[i].Revision, k)
		}
		seen[k] = true
	}
	mu.Unlock()
	if opened.Revision != 0 || opened.Calibration != nil {
		t.Errorf("first post %+v, want the opening", opened)
	}
	if closed.ID != onBus.ID || closed.Calibration == nil {
		t.Errorf("closed ticket %+v, want %s with the calibration", closed, onBus.ID)
	}
	// Sent items leave the outbox with a later commit.
	waitFor(t, "the outbox emptied", func() bool {
		bus, err1 := h.db.Outbox('B', 0, 10)
		hook, err2 := h.db.Outbox('W', 0, 10)
		return err1 == nil && err2 == nil && len(bus) == 0 && len(hook) == 0
	})

	// A mistyped id and a time years ahead are refused, naming the problem.
	for _, c := range []struct{ subject, body, want string }{
		{"driftfit.calibrations.qm.u1.steam.pt-1o2", `{"as_found": 1, "as_left": 1}`, "never reported"},
		{"driftfit.calibrations." + id, `{"t": "2030-01-01T00:00:00Z", "as_found": 1, "as_left": 1}`, "ahead of now"},
	} {
		reply, err := h.nc.Request(c.subject, []byte(c.body), 5*time.Second)
		if err != nil || !strings.Contains(string(reply.Data), c.want) {
			t.Errorf("calibration %s %s: reply %v, %v; want an error with %q", c.subject, c.body, reply, err, c.want)
		}
	}
	// A reply subject under the service's own prefixes gets no answer.
	sub, err := h.nc.SubscribeSync("driftfit.calibrations.qm.x.y")
	if err != nil {
		t.Fatal(err)
	}
	msg := nats.NewMsg("driftfit.calibrations." + id)
	msg.Reply = "driftfit.calibrations.qm.x.y"
	msg.Data = []byte(`{"as_found": 1, "as_left": 1}`)
	if err := h.nc.PublishMsg(msg); err != nil {
		t.Fatal(err)
	}
	if m, err := sub.NextMsg(500 * time.Millisecond); err == nil {
		t.Errorf("service answered onto its own calibration subject: %s", m.Data)
	}
}

// peerRun feeds 20 days of hourly readings of five transmitters on one
// header through a service, with or without peer comparison, and returns
// the raised events per sensor. The process steps up 20 kPa on day 8 and
// ramps at 1 kPa/day from day 12 — twice the slope limit — on every
// member alike; drifting, if not empty, adds a drift of 1 kPa/day from
// day 2 to that member alone.
func peerRun(t *testing.T, withPeers bool, drifting string) map[string][]alert.Event {
	t.Helper()
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	group := ""
	if withPeers {
		group = "qm.u1.steam."
	}
	h := startAlertService(t, ns.ClientURL(), dir, ptRule(50, 2), group, nil)
	// A connection of its own, so what the service publishes before it
	// stops is still read after.
	nc2, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc2.Close()
	sub, err := nc2.SubscribeSync("driftfit.alerts.>")
	if err != nil {
		t.Fatal(err)
	}
	if err := nc2.Flush(); err != nil {
		t.Fatal(err)
	}
	js, err := h.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	seed := uint64(31)
	rng := rand.New(rand.NewPCG(seed, 0))
	t0 := time.Date(2026, 10, 1, 0, 0, 0, 0, time.UTC)
	var ids []string
	for i := 1; i <= 5; i++ {
		ids = append(ids, fmt.Sprintf("qm.u1.steam.pt-10%d", i))
	}
	const hours = 20 * 24
	for hr := range hours {
		at := t0.Add(time.Duration(hr) * time.Hour)
		d := float64(hr) / 24
		process := 1000.0
		if d >= 8 {
			process += 20
		}
		if d >= 12 {
			process += 1 * (d - 12)
		}
		for _, id := range ids {
			v := process + 0.3*rng.NormFloat64()
			if id == drifting && d >= 2 {
				v += 1 * (d - 2)
			}
			publishJS(t, js, id, at, v)
		}
	}
	waitFor(t, "every reading applied", func() bool { return h.svc.Stats().Applied == hours*5 })
	h.stop() // commits and publishes what is left
	raised := map[string][]alert.Event{}
	for {
		m, err := sub.NextMsg(300 * time.Millisecond)
		if err != nil {
			return raised
		}
		var ev alert.Event
		if err := json.Unmarshal(m.Data, &ev); err != nil {
			t.Fatalf("event %s: %v", m.Data, err)
		}
		if ev.Type == alert.Raised {
			raised[ev.Sensor] = append(raised[ev.Sensor], ev)
		}
	}
}

// TestService_PeersProcessChangeVersusDrift checks peer comparison: a
// process step and ramp on the whole header raise no alert, one member
// drifting at twice the slope limit raises on that member only. Without
// peers the same process ramp raises alerts, so the first check can fail.
func TestService_PeersProcessChangeVersusDrift(t *testing.T) {
	if testing.Short() {
		t.Skip("three service runs of 2,400 readings each")
	}
	if got := peerRun(t, false, ""); len(got) == 0 {
		t.Fatal("without peer comparison the process ramp should raise alerts")
	}
	if got := peerRun(t, true, ""); len(got) != 0 {
		for id, evs := range got {
			t.Errorf("process change raised %d alerts on %s: %+v", len(evs), id, evs[0])
		}
	}
	got := peerRun(t, true, "qm.u1.steam.pt-103")
	for id, evs := range got {
		if id != "qm.u1.steam.pt-103" {
			t.Errorf("alert on %s, which does not drift: %+v", id, evs[0])
		}
	}
	evs := got["qm.u1.steam.pt-103"]
	if len(evs) == 0 {
		t.Fatal("the drifting member raised no alert")
	}
	if !strings.Contains(evs[0].Class, "vs peer group qm.u1.steam.") || evs[0].Kind != alert.Slope {
		t.Errorf("first alert %+v: want a slope alert on the peer deviation", evs[0])
	}
	t.Logf("drifting member: %d raises, first %s at %v, value %.3f kPa/d", len(evs), evs[0].Kind, evs[0].At, evs[0].Value)
}
