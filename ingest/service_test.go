package ingest_test

import (
	"context"
	"fmt"
	"net"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	dto "github.com/prometheus/client_model/go"

	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// natsServer runs a NATS server with JetStream in the test, its store in
// dir, on port (0: any free one).
func natsServer(t testing.TB, dir string, port int) *server.Server {
	t.Helper()
	return natsServerWith(t, &server.Options{StoreDir: dir, Port: port})
}

// natsServerWith runs a NATS server with JetStream from o, on 127.0.0.1
// and o.Port (0: any free one), logging and signals off unless o sets a
// logger through the returned server.
func natsServerWith(t testing.TB, o *server.Options) *server.Server {
	t.Helper()
	if o.Port == 0 {
		o.Port = -1
	}
	o.Host, o.JetStream, o.NoLog, o.NoSigs = "127.0.0.1", true, true, true
	ns, err := server.NewServer(o)
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("NATS server not ready")
	}
	return ns
}

type harness struct {
	svc    *ingest.Service
	db     *store.DB
	nc     *nats.Conn
	m      *ingest.Metrics
	cancel context.CancelFunc
	done   chan error
}

// testMaxPayload is below the NATS server's own limit, so an oversized
// payload reaches the service.
const testMaxPayload = 64 << 10

// startService runs a service on url with a real bbolt file in dir.
func startService(t *testing.T, url, dir string, mode ingest.Mode) *harness {
	t.Helper()
	return startServiceWith(t, url, dir, mode, nil)
}

// startServiceWith is startService with the options changed by edit
// (nil: none) before the service is made.
func startServiceWith(t *testing.T, url, dir string, mode ingest.Mode, edit func(*ingest.Options)) *harness {
	t.Helper()
	nc, err := nats.Connect(url, nats.MaxReconnects(-1), nats.ReconnectWait(50*time.Millisecond))
	if err != nil {
		t.Fatal(err)
	}
	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	m := ingest.NewMetrics()
	o := ingest.Options{
		Conn: nc,
		DB:   db,
		Mode: mode,
		Sensor: func(id string) (ingest.SensorConfig, error) {
			return ingest.SensorConfig{Windows: []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}}, Unit: "kPa"}, nil
		},
		CommitInterval: 20 * time.Millisecond,
		MaxPayload:     testMaxPayload,
		Metrics:        m,
	}
	if edit != nil {
		edit(&o)
	}
	svc, err := ingest.New(o)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	h := &harness{svc: svc, db: db, nc: nc, m: m, cancel: cancel, done: make(chan error, 1)}
	go func() { h.done <- svc.Run(ctx) }()
	t.Cleanup(h.stop)
	return h
}

func (h *harness) stop() {
	if h.cancel == nil {
		return
	}
	h.cancel()
	<-h.done
	h.cancel = nil
	h.nc.Close()
	h.db.Close()
}

// waitFor polls cond until it holds or 30 s pass.
func waitFor(t testing.TB, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(10 * time.Millisecond)
	}
}

// TestService_BadInput publishes one message of every kind of bad input,
// each surrounded by good readings, and checks that each is rejected with
// its reason, counted per reason, republished to the rejected subject with
// the reason in a header, and that every good reading was applied.
func TestService_BadInput(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	h := startService(t, ns.ClientURL(), dir, ingest.ModeStream)

	waitStream(t, h.nc)
	sub, err := h.nc.SubscribeSync("driftfit.rejected")
	if err != nil {
		t.Fatal(err)
	}
	if err := h.nc.Flush(); err != nil {
		t.Fatal(err)
	}
	now := time.Now()
	ts := func(d time.Duration) string { return fmt.Sprint(now.Add(d).Unix()) }
	good := func(d time.Duration, v float64) string { return fmt.Sprintf(`{"t":%s,"v":%g}`, ts(d), v) }
	cases := []struct {
		reason  string
		payload string
		good    int // good readings inside the same payload
	}{
		{"malformed_payload", `{"t": 1, "v": `, 0},
		{"missing_field", `{"t": ` + ts(-time.Hour) + `}`, 0},
		{"bad_time", `{"t": "soon", "v": 1}`, 0},
		{"non_finite", `[` + good(-50*time.Minute, 10) + `, {"t": ` + ts(-49*time.Minute) + `, "v": 1e999}]`, 1},
		{"wrong_type", `{"t": ` + ts(-time.Hour) + `, "v": "12"}`, 0},
		{"future_time", `[` + good(-48*time.Minute, 11) + `,` + good(time.Hour, 12) + `]`, 1},
		// Before 1970, for a sensor never calibrated: older than every
		// window, not "older than the last calibration".
		{"too_old", `{"t": -86400, "v": 1}`, 0},
		{"unit_mismatch", `{"t": ` + ts(-47*time.Minute) + `, "v": 1, "unit": "psi"}`, 0},
		{"length_mismatch", `{"sensor": "qm.t.pt-1", "t": [` + ts(-46*time.Minute) + `], "v": [1, 2]}`, 0},
		{"oversized", `{"t": ` + ts(-45*time.Minute) + `, "v": 1, "pad": "` + strings.Repeat("x", testMaxPayload) + `"}`, 0},
		// 1e200 then 0 made a pane's sum of squares overflow, and the
		// stored state could not be restored (rolling.MaxValue).
		{"out_of_range", `[` + good(-44*time.Minute, 13) + `, {"t": ` + ts(-43*time.Minute) + `, "v": 1e200}]`, 1},
	}
	subject := "driftfit.in.qm.t.pt-1"
	wantApplied := 0
	for i, c := range cases {
		if err := h.nc.Publish(subject, []byte(good(-time.Duration(40-i)*time.Minute, float64(i)))); err != nil {
			t.Fatal(err)
		}
		wantApplied++
		if err := h.nc.Publish(subject, []byte(c.payload)); err != nil {
			t.Fatalf("%s: %v", c.reason, err)
		}
		wantApplied += c.good
	}
	if err := h.nc.Publish(subject, []byte(good(-10*time.Minute, 99))); err != nil {
		t.Fatal(err)
	}
	wantApplied++

	got := map[string]*nats.Msg{}
	for range cases {
		m, err := sub.NextMsg(10 * time.Second)
		if err != nil {
			t.Fatalf("dead letters so far %v: %v", keys(got), err)
		}
		got[m.Header.Get(ingest.HeaderReason)] = m
	}
	for _, c := range cases {
		m := got[c.reason]
		if m == nil {
			t.Errorf("no dead letter with reason %s (got %v)", c.reason, keys(got))
			continue
		}
		if m.Header.Get(ingest.HeaderSubject) != subject || m.Header.Get(ingest.HeaderError) == "" {
			t.Errorf("%s: headers %v", c.reason, m.Header)
		}
		if c.reason == "too_old" && strings.Contains(m.Header.Get(ingest.HeaderError), "calibration") {
			t.Errorf("too_old: error %q blames a calibration the sensor never had", m.Header.Get(ingest.HeaderError))
		}
		var pm dto.Metric
		if err := h.m.Rejected.WithLabelValues(c.reason).Write(&pm); err != nil {
			t.Fatal(err)
		}
		if n := pm.GetCounter().GetValue(); n != 1 {
			t.Errorf("rejected{reason=%s} = %v, want 1", c.reason, n)
		}
	}
	waitFor(t, "good readings applied", func() bool { return h.svc.Stats().Applied == uint64(wantApplied) })
	if st := h.svc.Stats(); st.Rejected != uint64(len(cases)) {
		t.Errorf("Stats.Rejected = %d, want %d", st.Rejected, len(cases))
	}
}

// waitStream waits until the service has made its stream, so readings
// published from now on are kept.
func waitStream(t *testing.T, nc *nats.Conn) {
	t.Helper()
	js, err := nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	waitFor(t, "stream created", func() bool { _, err := js.StreamInfo("DRIFTFIT"); return err == nil })
}

func keys(m map[string]*nats.Msg) []string {
	var out []string
	for k := range m {
		out = append(out, k)
	}
	return out
}

// TestService_NATSRestart stops and restarts the NATS server (same port,
// same JetStream store) while the service reads a stream, and checks that
// every reading published before, during and after is applied once.
func TestService_NATSRestart(t *testing.T) {
	dir := t.TempDir()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	port := ln.Addr().(*net.TCPAddr).Port
	ln.Close()
	natsDir := filepath.Join(dir, "nats")
	ns := natsServer(t, natsDir, port)
	url := ns.ClientURL()
	h := startService(t, url, dir, ingest.ModeStream)

	pub, err := nats.Connect(url, nats.MaxReconnects(-1), nats.ReconnectWait(50*time.Millisecond))
	if err != nil {
		t.Fatal(err)
	}
	defer pub.Close()
	js, err := pub.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	start := time.Now().Add(-10 * time.Hour)
	n := 0
	publish := func(count int) {
		t.Helper()
		for range count {
			at := start.Add(time.Duration(n) * time.Second)
			payload := fmt.Sprintf(`{"t":%d.%09d,"v":%d}`, at.Unix(), at.Nanosecond(), n%17)
			// Stream publish with retries: during the restart the
			// publisher waits for the server like any producer would.
			for {
				if _, err := js.Publish(fmt.Sprintf("driftfit.in.qm.r.pt-%d", n%5), []byte(payload)); err == nil {
					break
				}
				time.Sleep(20 * time.Millisecond)
			}
			n++
		}
	}
	waitStream(t, pub)
	publish(2000)
	waitFor(t, "first part applied", func() bool { return h.svc.Stats().Applied >= 1000 })

	ns.Shutdown()
	ns.WaitForShutdown()
	ns = natsServer(t, natsDir, port)
	defer ns.Shutdown()
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { defer wg.Done(); publish(2000) }()
	wg.Wait()
	waitFor(t, "all applied", func() bool { return h.svc.Stats().Applied == uint64(n) })
	h.stop()
	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if applied, err := db.Applied(); err != nil || applied != uint64(n) {
		t.Errorf("stored applied count = %d (%v), want %d", applied, err, n)
	}
}

// TestService_Direct checks the core-NATS path: readings published after
// the subscription are applied and committed.
func TestService_Direct(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	h := startService(t, ns.ClientURL(), dir, ingest.ModeDirect)
	// Core NATS keeps nothing for late subscribers: probe until the
	// service's subscription is live.
	at := time.Now().Add(-time.Hour)
	waitFor(t, "subscription", func() bool {
		_ = h.nc.Publish("driftfit.in.qm.d.probe", []byte(fmt.Sprintf(`{"t":%d,"v":1}`, at.Unix())))
		time.Sleep(5 * time.Millisecond)
		return h.svc.Stats().Applied > 0
	})
	base := h.svc.Stats().Applied
	for i := range 500 {
		payload := fmt.Sprintf(`[{"t":%d,"v":%d},{"t":%d,"v":%d}]`, at.Unix()+int64(2*i), i, at.Unix()+int64(2*i+1), i)
		if err := h.nc.Publish(fmt.Sprintf("driftfit.in.qm.d.tt-%d", i%3), []byte(payload)); err != nil {
			t.Fatal(err)
		}
	}
	waitFor(t, "readings applied", func() bool { return h.svc.Stats().Applied == base+1000 })
	want := h.svc.Stats().Applied
	h.stop()
	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if n, err := db.Applied(); err != nil || n != want {
		t.Errorf("stored applied count = %d (%v), want %d", n, err, want)
	}
}

// TestService_Restart checks that restarting a sensor's fits (as after a
// calibration) empties its windows, refuses readings from before the
// restart, and deletes the stored panes of before it, so the state file
// holds only the readings since.
func TestService_Restart(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	h := startService(t, ns.ClientURL(), dir, ingest.ModeStream)
	waitStream(t, h.nc)
	js, err := h.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	base := time.Now().Add(-12 * time.Hour).Truncate(time.Hour)
	publish := func(fromMin, toMin int) {
		for m := fromMin; m < toMin; m += 10 {
			at := base.Add(time.Duration(m) * time.Minute)
			if _, err := js.Publish("driftfit.in.qm.c.pt-7", []byte(fmt.Sprintf(`{"t":%d,"v":%d}`, at.Unix(), m))); err != nil {
				t.Fatal(err)
			}
		}
	}
	publish(0, 300) // 30 readings
	waitFor(t, "first readings", func() bool { return h.svc.Stats().Applied == 30 })
	cut := base.Add(240 * time.Minute)
	if err := h.svc.Restart(t.Context(), "qm.c.pt-7", cut); err != nil {
		t.Fatal(err)
	}
	publish(200, 400) // 20 readings: 4 before the cut (refused), 16 after
	waitFor(t, "second readings", func() bool { st := h.svc.Stats(); return st.Applied == 46 && st.Rejected == 4 })
	h.stop()
	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	n := -1
	err = db.Restore(func(string) (*rolling.Sensor, error) {
		return rolling.NewSensor(rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour})
	}, func(r store.Restored) error {
		n = r.Sensor.Solve(0).N
		return nil
	})
	if err != nil || n != 16 {
		t.Errorf("stored sensor holds %d readings (%v), want the 16 since the restart", n, err)
	}
	db.Close()

	// A service started anew on the file still refuses readings from
	// before the restart: the cutoff was stored.
	h = startService(t, ns.ClientURL(), dir, ingest.ModeStream)
	if js, err = h.nc.JetStream(); err != nil {
		t.Fatal(err)
	}
	waitFor(t, "sensor restored", func() bool { return h.svc.Stats().Sensors == 1 })
	publish(230, 240) // 1 reading before the cut
	publish(400, 420) // 2 new readings after it
	waitFor(t, "readings after the service restart", func() bool {
		st := h.svc.Stats()
		return st.Applied == 2 && st.Rejected == 1
	})
}
