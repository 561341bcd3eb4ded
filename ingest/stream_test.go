package ingest_test

import (
	"bytes"
	"errors"
	"fmt"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/ingest"
)

// logBuf collects log lines for a test to look at; safe for concurrent
// use (zerolog writes each event with one Write).
type logBuf struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *logBuf) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *logBuf) has(s string) bool {
	l.mu.Lock()
	defer l.mu.Unlock()
	return strings.Contains(l.b.String(), s)
}

func publishReadings(t *testing.T, js nats.JetStreamContext, id string, from, n int) {
	t.Helper()
	base := time.Now().Add(-20 * time.Hour).Truncate(time.Hour)
	for i := from; i < from+n; i++ {
		at := base.Add(time.Duration(i) * time.Minute)
		if _, err := js.Publish("driftfit.in."+id, fmt.Appendf(nil, `{"t":%d,"v":%d}`, at.Unix(), i%9)); err != nil {
			t.Fatal(err)
		}
	}
}

// TestService_StreamRebuilt deletes and remakes the readings stream
// under a service's stored position, publishes 5 readings into the new
// one, and checks that the service refuses to start (naming the fix)
// instead of skipping them, and with ResetPosition reads all 5.
func TestService_StreamRebuilt(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	h := startService(t, ns.ClientURL(), dir, ingest.ModeStream)
	waitStream(t, h.nc)
	js, err := h.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	publishReadings(t, js, "qm.rb.pt-1", 0, 50)
	waitFor(t, "first readings committed", func() bool { return h.svc.Stats().Position == 50 })
	h.stop()

	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	if js, err = nc.JetStream(); err != nil {
		t.Fatal(err)
	}
	info, err := js.StreamInfo("DRIFTFIT")
	if err != nil {
		t.Fatal(err)
	}
	if err := js.DeleteStream("DRIFTFIT"); err != nil {
		t.Fatal(err)
	}
	cfg := info.Config
	if _, err := js.AddStream(&cfg); err != nil {
		t.Fatal(err)
	}
	publishReadings(t, js, "qm.rb.pt-1", 50, 5)

	h = startService(t, ns.ClientURL(), dir, ingest.ModeStream)
	var runErr error
	select {
	case runErr = <-h.done:
		h.done <- runErr // for h.stop
	case <-time.After(30 * time.Second):
		t.Fatalf("service started on a rebuilt stream; applied %d", h.svc.Stats().Applied)
	}
	var ce *ingest.StreamChangedError
	if !errors.Is(runErr, ingest.ErrStreamChanged) || !errors.As(runErr, &ce) || ce.Position != 50 || !strings.Contains(runErr.Error(), "--reset-position") {
		t.Fatalf("Run = %v; want a *StreamChangedError at position 50 naming --reset-position", runErr)
	}
	h.stop()

	h = startServiceWith(t, ns.ClientURL(), dir, ingest.ModeStream, func(o *ingest.Options) { o.ResetPosition = true })
	waitFor(t, "the new stream's readings", func() bool { return h.svc.Stats().Applied == 5 })
	waitFor(t, "position in the new stream", func() bool { return h.svc.Stats().Position == 5 })
	h.stop()

	// The reset is on the file: a plain start now reads on.
	publishReadings(t, js, "qm.rb.pt-1", 55, 3)
	h = startService(t, ns.ClientURL(), dir, ingest.ModeStream)
	waitFor(t, "readings after the reset", func() bool { return h.svc.Stats().Applied == 3 })
}

// TestService_StreamBounded checks what the bus keeps: committed readings
// are purged from the stream, dead letters go to their own stream, and
// when the readings stream is full (serve stopped, producers going on)
// the server refuses new readings to their producers while serve warns,
// and every reading the server acknowledged is applied, no more.
func TestService_StreamBounded(t *testing.T) {
	dir := t.TempDir()
	// A server allowing 1 MiB of JetStream files: the readings stream
	// gets 256 KiB, the dead letters 64 KiB.
	ns := natsServerWith(t, &server.Options{StoreDir: filepath.Join(dir, "nats"), JetStreamMaxStore: 1 << 20})
	defer ns.Shutdown()
	var logs logBuf
	lg := zerolog.New(&logs)
	limits := func(o *ingest.Options) {
		o.StreamMaxBytes, o.RejectedMaxBytes, o.Logger, o.CheckInterval = 256<<10, 64<<10, &lg, 50*time.Millisecond
		o.PurgeInterval = 50 * time.Millisecond
	}
	h := startServiceWith(t, ns.ClientURL(), dir, ingest.ModeStream, limits)
	waitStream(t, h.nc)
	js, err := h.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	info, err := js.StreamInfo("DRIFTFIT")
	if err != nil {
		t.Fatal(err)
	}
	if c := info.Config; c.MaxBytes != 256<<10 || c.Discard != nats.DiscardNew || len(c.Subjects) != 1 || c.Subjects[0] != "driftfit.in.>" {
		t.Errorf("readings stream max_bytes %d discard %v subjects %v; want 262144, new, [driftfit.in.>]", c.MaxBytes, c.Discard, c.Subjects)
	}

	publishReadings(t, js, "qm.bd.pt-1", 0, 500)
	if err := h.nc.Publish("driftfit.in.qm.bd.pt-1", []byte(`{"t":`)); err != nil {
		t.Fatal(err)
	}
	waitFor(t, "readings applied", func() bool { return h.svc.Stats().Applied == 500 && h.svc.Stats().Rejected == 1 })
	waitFor(t, "committed readings purged", func() bool {
		info, err := js.StreamInfo("DRIFTFIT")
		return err == nil && info.State.Msgs == 0
	})
	waitFor(t, "dead letter kept in its stream", func() bool {
		info, err := js.StreamInfo("DRIFTFIT_REJECTED")
		return err == nil && info.State.Msgs == 1 && info.Config.MaxBytes == 64<<10
	})
	h.stop()

	// Serve is down; a producer goes on until the stream is full.
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	if js, err = nc.JetStream(); err != nil {
		t.Fatal(err)
	}
	base := time.Now().Add(-10 * time.Hour)
	acked, refused := 0, 0
	var refusal error
	for i := 0; refused < 10; i++ {
		at := base.Add(time.Duration(i) * time.Second)
		_, err := js.Publish("driftfit.in.qm.bd.pt-2", fmt.Appendf(nil, `{"t":%d,"v":%d,"pad":"%s"}`, at.Unix(), i%5, strings.Repeat("x", 100)))
		if err != nil {
			refused++
			refusal = err
			continue
		}
		acked++
	}
	t.Logf("%d readings acknowledged, then refused: %v", acked, refusal)

	h = startServiceWith(t, ns.ClientURL(), dir, ingest.ModeStream, limits)
	waitFor(t, "acknowledged readings applied", func() bool { return h.svc.Stats().Applied >= uint64(acked) })
	if st := h.svc.Stats(); st.Applied != uint64(acked) {
		t.Errorf("applied %d, the server acknowledged %d", st.Applied, acked)
	}
	if !logs.has("readings stream nearly full") {
		t.Errorf("no warning of the full stream in the log")
	}
	// Once committed and purged, the stream takes readings again.
	waitFor(t, "stream emptied", func() bool {
		info, err := js.StreamInfo("DRIFTFIT")
		return err == nil && info.State.Msgs == 0
	})
	if _, err := js.Publish("driftfit.in.qm.bd.pt-2", fmt.Appendf(nil, `{"t":%d,"v":1}`, time.Now().Add(-time.Minute).Unix())); err != nil {
		t.Fatalf("publish after the purge: %v", err)
	}
	waitFor(t, "reading after the purge", func() bool { return h.svc.Stats().Applied == uint64(acked)+1 })
}

// TestService_StreamPurgeDeferred checks when committed messages leave
// the stream: not after each commit, but once what is committed and not
// purged reaches an eighth of the stream's limit (Options.PurgeInterval,
// the other trigger, is an hour here).
func TestService_StreamPurgeDeferred(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	h := startServiceWith(t, ns.ClientURL(), dir, ingest.ModeStream, func(o *ingest.Options) {
		o.StreamMaxBytes, o.PurgeInterval = 256<<10, time.Hour // purge at 32 KiB
	})
	waitStream(t, h.nc)
	js, err := h.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	stream := func() nats.StreamState {
		info, err := js.StreamInfo("DRIFTFIT")
		if err != nil {
			t.Fatal(err)
		}
		return info.State
	}
	// 200 messages of about 42 bytes (subject and payload): 8 KiB.
	publishReadings(t, js, "qm.pd.pt-1", 0, 200)
	waitFor(t, "200 messages committed", func() bool { return h.svc.Stats().Position >= 200 })
	time.Sleep(100 * time.Millisecond) // five commit intervals: no purge may follow
	if st := stream(); st.Msgs != 200 || st.FirstSeq != 1 {
		t.Fatalf("after committing 8 KiB, the stream holds %d messages from %d; want all 200 from 1", st.Msgs, st.FirstSeq)
	}
	// 800 more make 42 KiB: the commit that passes 32 KiB purges up to
	// its position.
	publishReadings(t, js, "qm.pd.pt-1", 200, 800)
	waitFor(t, "committed messages purged", func() bool { return stream().FirstSeq > 200 })
}

// TestService_StreamOfEarlierVersion starts a service on a stream made as
// earlier versions made it (no limits, every reading kept), holding more
// unapplied readings than the byte limit the service sets, and checks
// that none is lost to the new limit (the server, with discard-new, does
// not drop what a stream holds beyond a lowered limit): all are applied,
// then purged, and the limit holds.
func TestService_StreamOfEarlierVersion(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, err := nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	if _, err := js.AddStream(&nats.StreamConfig{Name: "DRIFTFIT", Subjects: []string{"driftfit.in.>"}, Storage: nats.FileStorage}); err != nil {
		t.Fatal(err)
	}
	publishReadings(t, js, "qm.old.pt-1", 0, 1000) // some 70 KB
	small := func(o *ingest.Options) { o.StreamMaxBytes = 16 << 10 }
	h := startServiceWith(t, ns.ClientURL(), dir, ingest.ModeStream, small)
	waitFor(t, "every reading applied", func() bool { return h.svc.Stats().Applied == 1000 })
	waitFor(t, "applied readings purged", func() bool {
		info, err := js.StreamInfo("DRIFTFIT")
		return err == nil && info.State.Msgs == 0
	})
	waitFor(t, "limit set", func() bool {
		info, err := js.StreamInfo("DRIFTFIT")
		return err == nil && info.Config.MaxBytes == 16<<10 && info.Config.Discard == nats.DiscardNew
	})
}
