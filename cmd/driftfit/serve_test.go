package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"driftfit/alert"
	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// startNATS runs a NATS server with JetStream in the test process, its
// store in dir; port 0 picks a free one.
func startNATS(t *testing.T, dir string, port int) *server.Server {
	t.Helper()
	if port == 0 {
		port = -1
	}
	ns, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: port, JetStream: true, StoreDir: dir, NoLog: true, NoSigs: true})
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("NATS server not ready")
	}
	t.Cleanup(ns.Shutdown)
	return ns
}

// testConfig writes a configuration for sensors "crash.*" reading from
// the server at url; extra is appended (YAML at the top level).
func testConfig(t *testing.T, dir, url, mode string, extra ...string) string {
	t.Helper()
	cfg := fmt.Sprintf(`bus:
  servers: [%q]
  mode: %s
store:
  dir: %q
  commit_interval: 50ms
  commit_max_sensors: 100
classes:
  - name: test
    match: ["crash.*"]
    unit: kPa
    span: {lower: 0, upper: 1000}
    tolerance: "5 kPa"
    min_readings: 20
    min_coverage: 0
    debounce: 1
    limits:
      slope: {warning: "1 kPa/day", critical: "3 kPa/day"}
      lead_time: {warning: 2d, critical: 12h}
`, url, mode, filepath.Join(dir, "data")) + strings.Join(extra, "")
	path := filepath.Join(dir, "driftfit.yaml")
	if err := os.WriteFile(path, []byte(cfg), 0o600); err != nil {
		t.Fatal(err)
	}
	return path
}

// child is a driftfit process run from the test binary.
type child struct {
	cmd  *exec.Cmd
	done chan error
}

func startChild(t *testing.T, logPath string, args ...string) *child {
	t.Helper()
	cmd := exec.Command(os.Args[0], "-test.run=^$")
	cmd.Env = append(os.Environ(), childEnv+"="+strings.Join(args, "\n"))
	logf, err := os.OpenFile(logPath, os.O_CREATE|os.O_APPEND|os.O_WRONLY, 0o600)
	if err != nil {
		t.Fatal(err)
	}
	cmd.Stdout, cmd.Stderr = logf, logf
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	c := &child{cmd: cmd, done: make(chan error, 1)}
	go func() { c.done <- cmd.Wait(); logf.Close() }()
	return c
}

// crashReadings are the test's readings in publish order: n sensors, each
// with per readings an hour apart, interleaved, ending an hour ago. One
// sensor in seven drifts at 4.8 kPa/day in 1 kPa of noise: past the
// critical slope limit and out of tolerance within the run, so it raises
// alerts and opens a ticket.
func crashReadings(n, per int) (ids []string, rs []rolling.Reading, owner []int) {
	end := time.Now().Add(-time.Hour).Truncate(time.Hour)
	start := end.Add(-time.Duration(per) * time.Hour)
	for i := range n {
		ids = append(ids, fmt.Sprintf("crash.s%04d", i))
	}
	rng := rand.New(rand.NewPCG(5, 0))
	for j := range per {
		for i := range n {
			at := start.Add(time.Duration(j)*time.Hour + time.Duration(rng.Int64N(int64(time.Hour))))
			v := 500 + float64(i%7)*0.001*float64(j) + rng.NormFloat64()
			if i%7 == 0 {
				v += 0.2 * float64(j)
			}
			rs = append(rs, rolling.Reading{UnixNano: at.UnixNano(), Value: v})
			owner = append(owner, i)
		}
	}
	return ids, rs, owner
}

// TestServe_CrashSafety kills a serving driftfit process with SIGKILL at
// random moments while 200,000 readings for 1,000 sensors are published
// to the stream, restarting it each time; drifting sensors raise alerts
// and open tickets meanwhile, and the ticket webhook refuses everything
// for its first seconds. After the last run the stored fits must be
// bit-identical to feeding the same readings in order through the
// engine, the applied count must equal the published one, every stored
// event and ticket must have been published on the bus under one stable
// Nats-Msg-Id, and every ticket must have reached the webhook, each
// revision under one Idempotency-Key.
func TestServe_CrashSafety(t *testing.T) {
	if testing.Short() {
		t.Skip("starts and kills driftfit processes")
	}
	seed := uint64(time.Now().UnixNano())
	t.Logf("kill-timing seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 1))
	dir := t.TempDir()
	ns := startNATS(t, filepath.Join(dir, "nats"), 0)
	hook := newHookRecorder(3 * time.Second)
	defer hook.Close()
	cfg := testConfig(t, dir, ns.ClientURL(), "stream", fmt.Sprintf("tickets:\n  webhook:\n    url: %q\n    max_backoff: 200ms\n", hook.URL))
	bus := newBusRecorder(t, ns.ClientURL(), "driftfit.alerts.>", "driftfit.tickets")
	logPath := filepath.Join(dir, "serve.log")
	args := []string{"serve", "--config", cfg, "--http-addr", "off", "--log-level", "warn"}

	js := readingStream(t, ns.ClientURL())

	ids, rs, owner := crashReadings(1000, 200)
	published := make(chan error, 1)
	go func() {
		var buf []byte
		for i, r := range rs {
			buf = ingest.AppendReading(buf[:0], ingest.Decoded{Reading: r})
			data := append([]byte(nil), buf...)
			for {
				_, err := js.PublishAsync("driftfit.in."+ids[owner[i]], data)
				if errors.Is(err, jetstream.ErrTooManyStalledMsgs) {
					<-js.PublishAsyncComplete() // let the acks catch up
					continue
				}
				if err != nil {
					published <- err
					return
				}
				break
			}
		}
		select {
		case <-js.PublishAsyncComplete():
			published <- nil
		case <-time.After(time.Minute):
			published <- fmt.Errorf("publish acks not complete")
		}
	}()

	kills := 0
	pubDone := false
	for kills < 10 || !pubDone {
		c := startChild(t, logPath, args...)
		select {
		case <-time.After(time.Duration(200+rng.IntN(600)) * time.Millisecond):
		case err := <-c.done:
			t.Fatalf("serve exited early: %v; log %s:\n%s", err, logPath, readTail(logPath))
		}
		if err := c.cmd.Process.Signal(syscall.SIGKILL); err != nil {
			t.Fatal(err)
		}
		<-c.done
		kills++
		select {
		case err := <-published:
			if err != nil {
				t.Fatal(err)
			}
			pubDone = true
		default:
		}
	}
	t.Logf("%d kills", kills)

	// Last run: until every message is delivered and acknowledged (acks
	// follow commits), then a graceful stop.
	started := time.Now()
	c := startChild(t, logPath, args...)
	waitCaughtUp(t, js, started, logPath)
	if err := c.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	select {
	case err := <-c.done:
		if err != nil {
			t.Fatalf("serve exit: %v; log:\n%s", err, readTail(logPath))
		}
	case <-time.After(30 * time.Second):
		t.Fatal("serve did not stop on SIGTERM")
	}

	// Reference: the same readings, in publish order, through the engine.
	specs := []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}, {Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour}}
	ref := make([]*rolling.Sensor, len(ids))
	for i := range ref {
		ref[i], _ = rolling.NewSensor(specs...)
	}
	for i, r := range rs {
		if err := ref[owner[i]].Add(r); err != nil {
			t.Fatal(err)
		}
	}
	db, err := store.Open(filepath.Join(dir, "data", dbFile), store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	checkPublished(t, db, bus, hook)
	applied, err := db.Applied()
	if err != nil || applied != uint64(len(rs)) {
		t.Errorf("applied = %d (%v), published %d", applied, err, len(rs))
	}
	index := map[string]int{}
	for i, id := range ids {
		index[id] = i
	}
	seen := 0
	err = db.Restore(func(string) (*rolling.Sensor, error) { return rolling.NewSensor(specs...) }, func(r store.Restored) error {
		seen++
		want := ref[index[r.ID]]
		for w := range specs {
			a, b := r.Sensor.Solve(w), want.Solve(w)
			for _, m := range rolling.Models {
				fa, fb := a.Fit(m), b.Fit(m)
				if fa.N != fb.N || fa.Coef != fb.Coef || fa.SE != fb.SE || math.Float64bits(fa.ResidSD) != math.Float64bits(fb.ResidSD) {
					t.Errorf("%s window %d %v: stored fit n=%d coef %v, uninterrupted n=%d coef %v", r.ID, w, m, fa.N, fa.Coef, fb.N, fb.Coef)
					return nil
				}
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if seen != len(ids) {
		t.Errorf("%d sensors stored, want %d", seen, len(ids))
	}
}

// readingStream connects to url and makes the readings stream before serve
// starts, so no reading published before serve makes it is lost. The
// connection closes at cleanup.
func readingStream(t *testing.T, url string) jetstream.JetStream {
	t.Helper()
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := js.CreateStream(t.Context(), jetstream.StreamConfig{Name: "DRIFTFIT", Subjects: []string{"driftfit.in.>"}, Storage: jetstream.FileStorage}); err != nil {
		t.Fatal(err)
	}
	return js
}

// waitCaughtUp waits until the consumer of a serve process started after
// started has delivered the whole stream and holds no unacknowledged
// message (acknowledgements follow commits); serve makes its consumer
// anew at every start, so one made before started is not it.
func waitCaughtUp(t *testing.T, js jetstream.JetStream, started time.Time, logPath string) {
	t.Helper()
	ctx := t.Context()
	stream, err := js.Stream(ctx, "DRIFTFIT")
	if err != nil {
		t.Fatal(err)
	}
	last := stream.CachedInfo().State.LastSeq
	deadline := time.Now().Add(3 * time.Minute)
	for {
		cons, err := js.Consumer(ctx, "DRIFTFIT", "driftfit")
		if err == nil {
			info := cons.CachedInfo()
			if info.Created.After(started) && info.NumPending == 0 && info.NumAckPending == 0 && info.Delivered.Stream >= last {
				return
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("serve did not catch up; log:\n%s", readTail(logPath))
		}
		time.Sleep(50 * time.Millisecond)
	}
}

func readTail(path string) string {
	b, _ := os.ReadFile(path)
	if len(b) > 4000 {
		b = b[len(b)-4000:]
	}
	return string(b)
}

var _ = context.Background

// busRecorder keeps every message seen on some subjects, by payload.
type busRecorder struct {
	mu  sync.Mutex
	ids map[string][]string // payload → the Nats-Msg-Id of each delivery
}

func newBusRecorder(t *testing.T, url string, subjects ...string) *busRecorder {
	t.Helper()
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	r := &busRecorder{ids: map[string][]string{}}
	for _, subj := range subjects {
		if _, err := nc.Subscribe(subj, func(m *nats.Msg) {
			r.mu.Lock()
			r.ids[string(m.Data)] = append(r.ids[string(m.Data)], m.Header.Get(nats.MsgIdHdr))
			r.mu.Unlock()
		}); err != nil {
			t.Fatal(err)
		}
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	return r
}

// hookRecorder is a ticket webhook that refuses everything for outage
// from its first request on, then keeps each body by Idempotency-Key.
type hookRecorder struct {
	*httptest.Server
	mu      sync.Mutex
	byKey   map[string][]string // key → bodies
	refused int
}

func newHookRecorder(outage time.Duration) *hookRecorder {
	h := &hookRecorder{byKey: map[string][]string{}}
	var until time.Time
	h.Server = httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		body, _ := io.ReadAll(r.Body)
		h.mu.Lock()
		defer h.mu.Unlock()
		if until.IsZero() {
			until = time.Now().Add(outage)
		}
		if time.Now().Before(until) {
			h.refused++
			http.Error(w, "receiver starting", http.StatusServiceUnavailable)
			return
		}
		k := r.Header.Get(ingest.HeaderIdempotency)
		h.byKey[k] = append(h.byKey[k], string(body))
	}))
	return h
}

// checkPublished checks that every event and ticket stored in db went out
// on the bus under one stable id, and every ticket revision reached the
// webhook under one stable key; repeats (a send again after a crash)
// must be exact, so a receiver can drop them by id.
func checkPublished(t *testing.T, db *store.DB, bus *busRecorder, hook *hookRecorder) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	var missing []string
	for {
		missing = missing[:0]
		var events, tickets int
		seen := map[string]bool{}
		bus.mu.Lock()
		_ = db.Events(time.Time{}, time.Time{}, func(_ time.Time, d []byte) error {
			events++
			if seen[string(d)] {
				t.Errorf("event stored twice (a decision made again after a crash): %s", d)
			}
			seen[string(d)] = true
			if ids := bus.ids[string(d)]; len(ids) == 0 {
				missing = append(missing, "event "+string(d))
			}
			return nil
		})
		_ = db.Tickets(func(id string, d []byte) error {
			tickets++
			if ids := bus.ids[string(d)]; len(ids) == 0 {
				missing = append(missing, "ticket "+id)
			}
			return nil
		})
		bus.mu.Unlock()
		if len(missing) == 0 {
			if events == 0 || tickets == 0 {
				t.Fatalf("%d events and %d tickets stored: the drifting sensors should have raised some", events, tickets)
			}
			t.Logf("%d events and %d tickets stored, all published", events, tickets)
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("%d stored but never published, e.g. %s", len(missing), missing[0])
		}
		time.Sleep(50 * time.Millisecond)
	}
	bus.mu.Lock()
	repeats := 0
	for body, ids := range bus.ids {
		for _, id := range ids {
			if id == "" || id != ids[0] {
				t.Errorf("payload published under ids %q: %s", ids, body)
				break
			}
		}
		repeats += len(ids) - 1
	}
	bus.mu.Unlock()
	t.Logf("%d publications repeated after a crash, each under its first id", repeats)

	var stored []alert.Ticket
	_ = db.Tickets(func(_ string, d []byte) error {
		var tk alert.Ticket
		if err := json.Unmarshal(d, &tk); err != nil {
			t.Fatal(err)
		}
		stored = append(stored, tk)
		return nil
	})
	deadline = time.Now().Add(30 * time.Second)
	for {
		hook.mu.Lock()
		got := map[string]bool{}
		bad := ""
		for k, bodies := range hook.byKey {
			for _, b := range bodies {
				if b != bodies[0] {
					bad = k
				}
			}
			var tk alert.Ticket
			if err := json.Unmarshal([]byte(bodies[0]), &tk); err == nil {
				got[tk.ID] = true
			}
		}
		refused := hook.refused
		hook.mu.Unlock()
		if bad != "" {
			t.Fatalf("webhook key %q came with different bodies", bad)
		}
		n := 0
		for _, tk := range stored {
			if got[tk.ID] {
				n++
			}
		}
		if n == len(stored) {
			t.Logf("webhook: all %d tickets delivered, %d posts refused during the outage", n, refused)
			if refused == 0 {
				t.Error("the webhook refused nothing: the outage did not happen")
			}
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("webhook has %d of %d stored tickets", n, len(stored))
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// TestServe_CalibrationDurableBeforeReply records a calibration with a
// running serve and kills it with SIGKILL the moment the reply arrives:
// after a restart the calibration must be in effect (the fits restarted
// at its time, the open ticket closed), as the reply promises it is
// stored.
func TestServe_CalibrationDurableBeforeReply(t *testing.T) {
	if testing.Short() {
		t.Skip("starts and kills driftfit processes")
	}
	dir := t.TempDir()
	ns := startNATS(t, filepath.Join(dir, "nats"), 0)
	cfg := testConfig(t, dir, ns.ClientURL(), "stream")
	logPath := filepath.Join(dir, "serve.log")
	args := []string{"serve", "--config", cfg, "--http-addr", "off", "--log-level", "warn"}
	js := readingStream(t, ns.ClientURL())
	ids, rs, owner := crashReadings(7, 100) // crash.s0000 drifts and opens a ticket
	for i, r := range rs {
		if _, err := js.Publish(t.Context(), "driftfit.in."+ids[owner[i]], ingest.AppendReading(nil, ingest.Decoded{Reading: r})); err != nil {
			t.Fatal(err)
		}
	}
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	tickets, err := nc.SubscribeSync("driftfit.tickets")
	if err != nil {
		t.Fatal(err)
	}
	c := startChild(t, logPath, args...)
	if _, err := tickets.NextMsg(30 * time.Second); err != nil {
		t.Fatalf("no ticket: %v; log:\n%s", err, readTail(logPath))
	}
	at := time.Unix(0, rs[len(rs)-1].UnixNano).Add(time.Minute).UTC().Truncate(time.Second)
	body := fmt.Sprintf(`{"t": %q, "as_found": 502.5, "as_left": 500.0}`, at.Format(time.RFC3339))
	reply, err := nc.Request("driftfit.calibrations.crash.s0000", []byte(body), 10*time.Second)
	var ans ingest.CalibrationReply
	if err != nil || json.Unmarshal(reply.Data, &ans) != nil || !ans.OK || ans.Record == nil || ans.Record.Seq != 1 {
		t.Fatalf("calibration reply %v, %v; want ok with record 1", reply, err)
	}
	if err := c.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	<-c.done

	db, err := store.Open(filepath.Join(dir, "data", dbFile), store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	var restart int64 = -1
	specs := []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}, {Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour}}
	err = db.Restore(func(string) (*rolling.Sensor, error) { return rolling.NewSensor(specs...) }, func(r store.Restored) error {
		if r.ID == "crash.s0000" {
			restart = r.Restart
			if sol := r.Sensor.Solve(0); sol.N != 0 {
				t.Errorf("crash.s0000 holds %d readings after its calibration, want its fits restarted", sol.N)
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if restart != at.UnixNano() {
		t.Errorf("stored restart of crash.s0000 = %v, want the calibration time %v", time.Unix(0, restart).UTC(), at)
	}
	closed := false
	_ = db.Tickets(func(_ string, d []byte) error {
		var tk alert.Ticket
		if json.Unmarshal(d, &tk) == nil && tk.Sensor == "crash.s0000" && tk.Calibration != nil && tk.Calibration.AsFound == 502.5 {
			closed = true
		}
		return nil
	})
	if !closed {
		t.Error("the ticket of crash.s0000 is not closed by the calibration after the kill")
	}
}

// TestServe_SecondOnSameDataRefused starts serve twice on one data
// directory with the embedded bus: the second must stop at the state
// file's lock, before it starts a NATS server of its own on the same
// JetStream store (where published readings would vanish).
func TestServe_SecondOnSameDataRefused(t *testing.T) {
	if testing.Short() {
		t.Skip("starts driftfit processes")
	}
	dir := t.TempDir()
	logPath := filepath.Join(dir, "serve.log")
	args := []string{"serve", "--data", filepath.Join(dir, "data"), "--nats-port", "-1", "--http-addr", "off"}
	first := startChild(t, logPath, args...)
	defer func() {
		_ = first.cmd.Process.Signal(syscall.SIGTERM)
		<-first.done
	}()
	deadline := time.Now().Add(30 * time.Second)
	for !strings.Contains(readTail(logPath), "ingest started") {
		if time.Now().After(deadline) {
			t.Fatalf("first serve did not start; log:\n%s", readTail(logPath))
		}
		time.Sleep(20 * time.Millisecond)
	}
	secondLog := filepath.Join(dir, "second.log")
	second := startChild(t, secondLog, args...)
	select {
	case err := <-second.done:
		if err == nil {
			t.Fatal("second serve on the same data directory exited 0")
		}
	case <-time.After(30 * time.Second):
		_ = second.cmd.Process.Kill()
		t.Fatal("second serve on the same data directory kept running")
	}
	out := readTail(secondLog)
	if strings.Contains(out, "embedded NATS server listening") || !strings.Contains(out, "lock") {
		t.Errorf("second serve: want it stopped at the file lock before any NATS server; log:\n%s", out)
	}
}
