package main

import (
	"context"
	"encoding/json"
	"path/filepath"
	"slices"
	"sort"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/demo"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/store"
)

// TestDemo_HeadlineSensorsTicketed runs what serve --demo runs, in this
// process: the demo plant's 30-day backfill (with its bursts of bad
// messages) published by demo.Publish into a service judging by the
// rules of configs/demo.yaml, on a real NATS server and a real state
// file. The drifting sensors the README names must be ticketed, and no
// sensor the plant keeps stable (or whose whole furnace zone steps, a
// process change) may be.
func TestDemo_HeadlineSensorsTicketed(t *testing.T) {
	if testing.Short() {
		t.Skip("publishes and judges 259,200 readings")
	}
	dir := t.TempDir()
	ns, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, JetStream: true, StoreDir: filepath.Join(dir, "nats"), NoLog: true, NoSigs: true})
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("NATS server not ready")
	}
	defer ns.Shutdown()
	cfg, err := configs.Load("../../configs/demo.yaml")
	if err != nil {
		t.Fatal(err)
	}
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	db, err := store.Open(filepath.Join(dir, "driftfit.db"), store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	log := zerolog.New(zerolog.NewTestWriter(t)).Level(zerolog.InfoLevel)
	opts := serviceOptions(cfg, db, &log, nil)
	opts.Conn = nc
	svc, err := ingest.New(opts)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	js, err := nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	deadline := time.Now().Add(10 * time.Second)
	for _, err := js.StreamInfo(cfg.Bus.StreamName); err != nil; _, err = js.StreamInfo(cfg.Bus.StreamName) {
		if time.Now().After(deadline) {
			t.Fatalf("stream %s not created: %v", cfg.Bus.StreamName, err)
		}
		time.Sleep(10 * time.Millisecond)
	}

	// 30 days of hourly readings of 360 sensors, a day per message, as
	// demo-feed --batch 24 publishes them, in 5 s of wall time.
	pub := demo.Options{Prefix: cfg.Bus.SubjectPrefix, Wall: 5 * time.Second, Batch: 24, Bad: true, Seed: 1}
	if err := demo.Publish(ctx, nc, pub, zerolog.Nop()); err != nil {
		t.Fatal(err)
	}
	const readings = 360 * 30 * 24
	for deadline := time.Now().Add(2 * time.Minute); svc.Stats().Applied < readings; {
		if time.Now().After(deadline) {
			t.Fatalf("applied %d of %d readings", svc.Stats().Applied, readings)
		}
		time.Sleep(20 * time.Millisecond)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	st := svc.Stats()
	ticketed := map[string]string{} // sensor → kind
	if err := db.Tickets(func(_ string, data []byte) error {
		var tk alert.Ticket
		if err := json.Unmarshal(data, &tk); err != nil {
			return err
		}
		ticketed[tk.Sensor] = tk.Reason.String() + " " + tk.Window + " " + tk.Class
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	raised := map[string]bool{}
	if err := db.Events(time.Time{}, time.Now().Add(time.Hour), func(_ time.Time, data []byte) error {
		var ev alert.Event
		if err := json.Unmarshal(data, &ev); err != nil {
			return err
		}
		if ev.Type == alert.Raised {
			raised[ev.Sensor] = true
		}
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}

	// The misbehaving sensors of demo.Plant; the README names gd-502 and
	// the header's pt-102 the drift that stands out.
	headline := []string{"qm.u2.pumpbay.gd-502", "qm.u1.steam.pt-102"}
	misbehaving := []string{"qm.u1.steam.pt-102", "qm.u3.feed.pt-107", "qm.u2.reactor.tt-204", "qm.u1.furnace.te-305",
		"qm.u4.product.ft-403", "qm.u2.pumpbay.gd-502", "qm.u4.compressor.vt-601"}
	for _, id := range headline {
		if _, ok := ticketed[id]; !ok {
			t.Errorf("headline sensor %s not ticketed (raised %v)", id, raised[id])
		}
	}
	var ids []string
	for id := range ticketed {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	for _, id := range ids {
		if !slices.Contains(misbehaving, id) {
			t.Errorf("stable sensor %s ticketed (%s)", id, ticketed[id])
		}
	}
	t.Logf("applied %d, rejected %d; ticketed %d: %v; raised on %d sensors", st.Applied, st.Rejected, len(ticketed), ticketed, len(raised))
}
