package main

import (
	"context"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

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
// the server at url.
func testConfig(t *testing.T, dir, url, mode string) string {
	t.Helper()
	cfg := fmt.Sprintf(`bus:
  servers: [%q]
  mode: %s
store:
  dir: %q
  commit_interval: 50ms
classes:
  - name: test
    match: ["crash.*"]
    unit: kPa
    span: {lower: 0, upper: 1000}
    tolerance: "1 kPa"
`, url, mode, filepath.Join(dir, "data"))
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
// with per readings an hour apart, interleaved, ending an hour ago.
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
			v := 500 + float64(i%7)*0.01*float64(j) + rng.NormFloat64()
			rs = append(rs, rolling.Reading{UnixNano: at.UnixNano(), Value: v})
			owner = append(owner, i)
		}
	}
	return ids, rs, owner
}

// TestServe_CrashSafety kills a serving driftfit process with SIGKILL at
// random moments while 200,000 readings for 1,000 sensors are published
// to the stream, restarting it each time. After the last run the stored
// fits must be bit-identical to feeding the same readings in order
// through the engine, and the applied count must equal the published one.
func TestServe_CrashSafety(t *testing.T) {
	if testing.Short() {
		t.Skip("starts and kills driftfit processes")
	}
	seed := uint64(time.Now().UnixNano())
	t.Logf("kill-timing seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 1))
	dir := t.TempDir()
	ns := startNATS(t, filepath.Join(dir, "nats"), 0)
	cfg := testConfig(t, dir, ns.ClientURL(), "stream")
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
