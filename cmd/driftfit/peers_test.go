package main

import (
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/rolling"
)

const peerTestConfig = `classes:
  - name: pt
    match: ["qm.*.*.pt-*"]
    unit: kPa
    span: {lower: 0, upper: 2000}
    tolerance: "50 kPa"
    windows:
      - {span: 5d, pane: 6h}
    min_readings: 20
    debounce: 2
    limits:
      slope: "0.5 kPa/day"
groups:
  - name: u1-steam-header
    members: ["qm.u1.steam.pt-10?"]
`

// peerRun feeds 20 days of hourly readings of five transmitters on one
// header through the alerter, with or without peer comparison, and
// returns the raised events per sensor. The process steps up 20 kPa on
// day 8 and ramps at 1 kPa/day from day 12 — twice the slope limit —
// on every member alike; drifting, if not empty, adds a drift of
// 1 kPa/day from day 2 to that member alone.
func peerRun(t *testing.T, withPeers bool, drifting string) map[string][]alert.Event {
	t.Helper()
	nc, cfg, db := alertSetup(t, peerTestConfig)
	a, err := newAlerter(cfg, nc, db, zerolog.Nop(), webhookOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if withPeers {
		a.peers = newPeers(cfg, a, zerolog.New(zerolog.NewTestWriter(t)))
	}
	var mu sync.Mutex
	raised := map[string][]alert.Event{}
	sub, err := nc.Subscribe(cfg.Bus.AlertSubjectPrefix+".>", func(m *nats.Msg) {
		var ev alert.Event
		if err := json.Unmarshal(m.Data, &ev); err != nil {
			t.Errorf("event %s: %v", m.Data, err)
			return
		}
		if ev.Type == alert.Raised {
			mu.Lock()
			raised[ev.Sensor] = append(raised[ev.Sensor], ev)
			mu.Unlock()
		}
	})
	if err != nil {
		t.Fatal(err)
	}
	defer sub.Unsubscribe()
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { defer close(done); a.run(ctx) }()

	seed := uint64(31)
	rng := rand.New(rand.NewPCG(seed, 0))
	t0 := time.Date(2026, 10, 1, 0, 0, 0, 0, time.UTC)
	var ids []string
	sensors := map[string]*rolling.Sensor{}
	for i := 1; i <= 5; i++ {
		id := fmt.Sprintf("qm.u1.steam.pt-10%d", i)
		ids = append(ids, id)
		sensors[id], _ = rolling.NewSensor(rolling.WindowSpec{Span: 5 * 24 * time.Hour, Pane: 6 * time.Hour})
	}
	for h := range 20 * 24 {
		at := t0.Add(time.Duration(h) * time.Hour)
		d := float64(h) / 24
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
			s := sensors[id]
			if mask := s.Closes(at.UnixNano()); mask != 0 {
				sol := s.Solve(0)
				a.paneClosed(id, 0, &sol)
			}
			r := rolling.Reading{UnixNano: at.UnixNano(), Value: v}
			if err := s.Add(r); err != nil {
				t.Fatal(err)
			}
			if a.peers != nil {
				a.peers.applied(id, []rolling.Reading{r})
			}
		}
	}
	cancel()
	<-done
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	time.Sleep(50 * time.Millisecond) // let the subscriber take the last flush
	mu.Lock()
	defer mu.Unlock()
	return raised
}

// TestPeers_ProcessChangeVersusDrift checks peer comparison: a process
// step and ramp on the whole header raise no alert, one member drifting
// at twice the slope limit raises on that member only. Without peers the
// same process ramp raises alerts, so the first check can fail.
func TestPeers_ProcessChangeVersusDrift(t *testing.T) {
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
	if !strings.Contains(evs[0].Class, "vs peer group u1-steam-header") || evs[0].Kind != alert.Slope {
		t.Errorf("first alert %+v: want a slope alert on the peer deviation", evs[0])
	}
	t.Logf("drifting member: %d raises, first %s at %v, value %.3f kPa/d", len(evs), evs[0].Kind, evs[0].At, evs[0].Value)
}
