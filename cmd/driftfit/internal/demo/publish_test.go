package demo_test

import (
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	demo "driftfit/cmd/driftfit/internal/demo"
)

// TestPublish_StreamKeepsEveryReading publishes the demo backfill as fast
// as it goes into a stream whose server buffers at most 10 inbound
// messages, and checks the stream holds every reading: with core
// publishes, the server drops what overruns its buffer, with only a
// warning in its log (nats-server's "Dropping messages due to excessive
// stream ingest rate"), while acknowledged publishes wait.
func TestPublish_StreamKeepsEveryReading(t *testing.T) {
	ns, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, JetStream: true, StoreDir: t.TempDir(),
		NoLog: true, NoSigs: true, StreamMaxBufferedMsgs: 10})
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("NATS server not ready")
	}
	t.Cleanup(ns.Shutdown)
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, err := nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	if _, err := js.AddStream(&nats.StreamConfig{Name: "DEMO", Subjects: []string{"qm.in.>"}}); err != nil {
		t.Fatal(err)
	}
	const sensors, hours = 100, 200
	o := demo.Options{Prefix: "qm.in", Sensors: sensors, Backfill: hours * time.Hour, Every: time.Hour, Rate: 1e9}
	if err := demo.Publish(t.Context(), nc, o, zerolog.Nop()); err != nil {
		t.Fatal(err)
	}
	info, err := js.StreamInfo("DEMO")
	if err != nil {
		t.Fatal(err)
	}
	if info.State.Msgs != sensors*hours {
		t.Errorf("stream holds %d readings, want %d", info.State.Msgs, sensors*hours)
	}
}
