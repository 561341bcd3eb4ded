package main

import (
	"context"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/configs"
	"driftfit/rolling"
	"driftfit/store"
)

const alertTestConfig = `classes:
  - name: pt
    match: ["qm.*.*.pt-*"]
    unit: kPa
    span: {lower: 0, upper: 1000}
    tolerance: "5 kPa"
    windows:
      - {span: 5d, pane: 6h}
    min_readings: 20
    min_coverage: 0.5
    debounce: 1
    limits:
      slope: "0.5 kPa/day"
`

// TestAlerter_TicketSurvivesReceiverOutage drives a drifting sensor through
// the alerter until it raises a slope alert and opens a ticket, while the
// webhook receiver fails its first requests; the ticket must arrive once
// the receiver is back, and be on the bus and in the store. A calibration
// event then closes it, and the closed ticket is delivered too.
func TestAlerter_TicketSurvivesReceiverOutage(t *testing.T) {
	nc, cfg, db := alertSetup(t, alertTestConfig)

	var mu sync.Mutex
	var got []alert.Ticket
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
	}))
	defer recv.Close()

	tickets, err := nc.SubscribeSync(cfg.Bus.TicketSubject)
	if err != nil {
		t.Fatal(err)
	}
	a, err := newAlerter(cfg, nc, db, zerolog.New(zerolog.NewTestWriter(t)), webhookOptions{url: recv.URL, firstRetry: 20 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	stopCal, err := a.subscribeCalibrations(cfg.Bus.CalibrationSubjectPrefix)
	if err != nil {
		t.Fatal(err)
	}
	defer stopCal()
	ctx, cancel := context.WithCancel(context.Background())
	var wg sync.WaitGroup
	wg.Add(2)
	go func() { defer wg.Done(); a.run(ctx) }()
	go func() { defer wg.Done(); a.deliver(ctx) }()
	defer func() { cancel(); wg.Wait() }()

	// 2 kPa/day of drift in 0.2 kPa noise, one reading an hour.
	id := "qm.u1.steam.pt-102"
	s, err := rolling.NewSensor(rolling.WindowSpec{Span: 5 * 24 * time.Hour, Pane: 6 * time.Hour})
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Date(2026, 9, 1, 0, 0, 0, 0, time.UTC)
	for h := range 24 * 6 {
		at := t0.Add(time.Duration(h) * time.Hour)
		if s.Closes(at.UnixNano()) != 0 {
			sol := s.Solve(0)
			a.paneClosed(id, 0, &sol)
		}
		v := 500 + 2*float64(h)/24 + 0.2*float64((h*7919)%11-5)/5
		if err := s.Add(rolling.Reading{UnixNano: at.UnixNano(), Value: v}); err != nil {
			t.Fatal(err)
		}
	}
	m, err := tickets.NextMsg(10 * time.Second)
	if err != nil {
		t.Fatalf("no ticket on %s: %v", cfg.Bus.TicketSubject, err)
	}
	var onBus alert.Ticket
	if err := json.Unmarshal(m.Data, &onBus); err != nil || onBus.Sensor != id || onBus.Caution == "" {
		t.Fatalf("ticket on the bus: %+v, %v", onBus, err)
	}
	pollUntil(t, "the ticket delivered after the outage", func() bool {
		mu.Lock()
		defer mu.Unlock()
		return len(got) == 1
	})

	// Calibrate through the bus, as driftfit calibrated does.
	reply, err := nc.Request(cfg.Bus.CalibrationSubjectPrefix+"."+id, []byte(`{"as_found": 511.9, "as_left": 500.1}`), 5*time.Second)
	if err != nil || string(reply.Data) != `{"ok":true}` {
		t.Fatalf("calibration reply %v, %v", reply, err)
	}
	pollUntil(t, "the closed ticket delivered", func() bool {
		mu.Lock()
		defer mu.Unlock()
		return len(got) == 2
	})
	mu.Lock()
	closed := got[1]
	mu.Unlock()
	if closed.ID != onBus.ID || closed.Calibration == nil || closed.Calibration.AsFound != 511.9 {
		t.Errorf("closed ticket %+v, want %s with the calibration", closed, onBus.ID)
	}
	// The receiver has both; the sender marks the second done once it
	// has the answer. (Stopped before that, it would send it again.)
	pollUntil(t, "the outbox emptied", func() bool {
		left, err := db.Outbox(1, 0, 10)
		return err == nil && len(left) == 0
	})
	cancel()
	wg.Wait()
	stored := 0
	_ = db.Tickets(func(string, []byte) error { stored++; return nil })
	left, _ := db.Outbox(1, 0, 10)
	if stored != 1 || len(left) != 0 {
		t.Errorf("stored tickets %d (want 1), outbox left %d (want 0)", stored, len(left))
	}
}

// alertSetup starts a NATS server and opens a state file for an alerter
// test, with the configuration in yaml; everything closes at cleanup.
func alertSetup(t *testing.T, yaml string) (*nats.Conn, *configs.Config, *store.DB) {
	t.Helper()
	dir := t.TempDir()
	ns := startNATS(t, filepath.Join(dir, "nats"), 0)
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	cfg, err := configs.Parse("test.yaml", []byte(yaml))
	if err != nil {
		t.Fatal(err)
	}
	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { db.Close() })
	return nc, cfg, db
}

func pollUntil(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(10 * time.Millisecond)
	}
}
