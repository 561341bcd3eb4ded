package readapi_test

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/ingest"
	"driftfit/ingest/readapi"
	"driftfit/rolling"
	"driftfit/store"
)

// fixture is a state file with fit history, events and tickets, served
// on an in-process NATS server, and a client of it.
type fixture struct {
	db     *store.DB
	client *readapi.Client
	nc     *nats.Conn
	sensor string
}

// records is enough 1h-pane closes that the history reply spans several
// chunks (a record is a few hundred bytes, ChunkBytes 256 KiB).
const records = 3000

// natsURL runs a NATS server in the test and returns its address.
func natsURL(t *testing.T) string {
	t.Helper()
	ns, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, NoLog: true, NoSigs: true})
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("NATS server not ready")
	}
	t.Cleanup(ns.Shutdown)
	return ns.ClientURL()
}

func newFixture(t *testing.T) *fixture {
	t.Helper()
	url := natsURL(t)
	db, err := store.Open(filepath.Join(t.TempDir(), "driftfit.db"), store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		if err := db.Check(); err != nil {
			t.Error(err)
		}
		db.Close()
	})
	f := &fixture{db: db, sensor: "qm.u1.steam.pt-101"}
	s, err := rolling.NewSensor(rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour})
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	var b store.Batch
	for k := range records + 1 {
		at := t0.Add(time.Duration(k) * time.Hour)
		if s.Closes(at.UnixNano()) != 0 {
			sol := s.Solve(0)
			if err := b.Record(f.sensor, &sol); err != nil {
				t.Fatal(err)
			}
		}
		if err := s.Add(rolling.Reading{UnixNano: at.UnixNano(), Value: 1000 + 0.01*float64(k) + float64(k%7)}); err != nil {
			t.Fatal(err)
		}
	}
	if err := b.Sensor(f.sensor, s); err != nil {
		t.Fatal(err)
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	err = db.WriteAlerts([]store.AlertWrite{{
		Sensor:       f.sensor,
		Events:       []store.TimedValue{{At: t0, Data: []byte(`{"n":1}`)}, {At: t0.Add(time.Hour), Data: []byte(`{"n":2}`)}},
		Tickets:      map[string][]byte{"a@1": []byte(`{"id":"a@1"}`), "b@2": []byte(`{"id":"b@2"}`)},
		Calibrations: map[uint64][]byte{1: []byte(`{"seq":1,"status":"voided"}`), 2: []byte(`{"seq":2}`)},
	}, {
		Sensor: "qm.u1.steam.pt-101a", Calibrations: map[uint64][]byte{1: []byte(`{"seq":1}`)},
	}})
	if err != nil {
		t.Fatal(err)
	}
	if f.nc, err = nats.Connect(url); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(f.nc.Close)
	stop, err := readapi.Serve(f.nc, db, zerolog.New(zerolog.NewTestWriter(t)))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(stop)
	if err := f.nc.Flush(); err != nil {
		t.Fatal(err)
	}
	if f.client, err = readapi.Dial(url, "readapi test"); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { f.client.Close() })
	return f
}

// source is what both the file and the client offer.
type source interface {
	History(sensor string, window rolling.WindowSpec, since, until time.Time, fn func(store.HistoryRecord) error) error
	HistorySensors(fn func(id string) error) error
	Events(since, until time.Time, fn func(at time.Time, data []byte) error) error
	Tickets(fn func(id string, data []byte) error) error
	Calibrations(sensor string, fn func(sensor string, n uint64, data []byte) error) error
}

// dump renders every answer of src in one text, records in the store's
// own encoding, so the file read directly is the reference.
func dump(t *testing.T, src source, sensor string, since, until time.Time) (string, int) {
	t.Helper()
	var b strings.Builder
	n := 0
	err := src.History(sensor, rolling.WindowSpec{}, since, until, func(r store.HistoryRecord) error {
		n++
		enc, err := store.AppendHistoryRecord(nil, &r)
		fmt.Fprintf(&b, "rec %x\n", enc)
		return err
	})
	if err != nil {
		t.Fatal(err)
	}
	if err := src.HistorySensors(func(id string) error { fmt.Fprintf(&b, "sensor %s\n", id); return nil }); err != nil {
		t.Fatal(err)
	}
	if err := src.Events(since, until, func(at time.Time, d []byte) error {
		fmt.Fprintf(&b, "event %d %s\n", at.UnixNano(), d)
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	if err := src.Tickets(func(id string, d []byte) error { fmt.Fprintf(&b, "ticket %s %s\n", id, d); return nil }); err != nil {
		t.Fatal(err)
	}
	for _, id := range []string{"", sensor} {
		if err := src.Calibrations(id, func(id string, k uint64, d []byte) error {
			fmt.Fprintf(&b, "calibration %s %d %s\n", id, k, d)
			return nil
		}); err != nil {
			t.Fatal(err)
		}
	}
	return b.String(), n
}

func TestClient_AnswersAsTheFile(t *testing.T) {
	f := newFixture(t)
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	for _, tc := range []struct {
		name         string
		since, until time.Time
		minRecords   int
	}{
		// records+1 readings an hour apart close records panes.
		{"everything", time.Time{}, time.Time{}, records},
		{"one day", t0.Add(48 * time.Hour), t0.Add(72 * time.Hour), 24},
	} {
		t.Run(tc.name, func(t *testing.T) {
			want, n := dump(t, f.db, f.sensor, tc.since, tc.until)
			got, _ := dump(t, f.client, f.sensor, tc.since, tc.until)
			if n != tc.minRecords {
				t.Errorf("file holds %d records in range, want %d", n, tc.minRecords)
			}
			if got != want {
				t.Errorf("client answers differ from the file:\n got %.400s\nwant %.400s", got, want)
			}
		})
	}
}

func TestClient_ServiceErrors(t *testing.T) {
	f := newFixture(t)
	// An empty id is refused by the store; the error travels back.
	err := f.client.History("", rolling.WindowSpec{}, time.Time{}, time.Time{}, func(store.HistoryRecord) error { return nil })
	var se *readapi.ServiceError
	if !errors.As(err, &se) || se.Subject != readapi.HistorySubject {
		t.Errorf("History(\"\") = %v, want a *ServiceError from %s", err, readapi.HistorySubject)
	}
	// A request that is not JSON.
	msg, err := f.nc.Request(readapi.HistorySubject, []byte("{"), readapi.Timeout)
	if err != nil {
		t.Fatal(err)
	}
	if h := msg.Header.Get(readapi.HeaderError); !strings.Contains(h, "bad request") {
		t.Errorf("reply to a malformed request has %s %q, want \"bad request\"", readapi.HeaderError, h)
	}
	// An error from fn stops the walk and comes back as it is.
	stop := errors.New("enough")
	err = f.client.History(f.sensor, rolling.WindowSpec{}, time.Time{}, time.Time{}, func(store.HistoryRecord) error { return stop })
	if !errors.Is(err, stop) {
		t.Errorf("History with a failing fn = %v, want %v", err, stop)
	}
}

func TestClient_Calibrate(t *testing.T) {
	f := newFixture(t)
	var got ingest.CalibrationMsg
	sub, err := f.nc.Subscribe("cal.>", func(m *nats.Msg) {
		if err := json.Unmarshal(m.Data, &got); err != nil {
			t.Error(err)
		}
		ans := []byte(`{"ok":true,"record":{"sensor":"qm.x","seq":4}}`)
		if strings.HasSuffix(m.Subject, ".bad") {
			ans = []byte(`{"ok":false,"error":"no such sensor"}`)
		}
		_ = m.Respond(ans)
	})
	if err != nil {
		t.Fatal(err)
	}
	defer sub.Unsubscribe()
	if err := f.nc.Flush(); err != nil {
		t.Fatal(err)
	}
	want := ingest.CalibrationMsg{T: "2026-03-01T00:00:00Z", AsFound: 1.25, AsLeft: -0.5}
	if rec, err := f.client.Calibrate(context.Background(), "cal", "qm.x", want); err != nil || got != want || rec == nil || rec.Seq != 4 {
		t.Errorf("Calibrate = %+v, %v, service got %+v; want record 4, nil and %+v", rec, err, got, want)
	}
	_, err = f.client.Calibrate(context.Background(), "cal", "bad", want)
	var se *readapi.ServiceError
	if !errors.As(err, &se) || se.Msg != "no such sensor" {
		t.Errorf("Calibrate refused = %v, want a *ServiceError with the service's message", err)
	}
}

// TestClient_MalformedReply: a reply cut inside a frame is refused, not
// read past its end.
func TestClient_MalformedReply(t *testing.T) {
	url := natsURL(t)
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	// A frame announcing 127 bytes with 2 present.
	if _, err := nc.Subscribe(readapi.TicketsSubject, func(m *nats.Msg) { _ = m.Respond([]byte{0x7f, 1, 2}) }); err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	c, err := readapi.Dial(url, "readapi test")
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	if err := c.Tickets(func(string, []byte) error { return nil }); !errors.Is(err, readapi.ErrMalformedReply) {
		t.Errorf("Tickets on a truncated frame = %v, want ErrMalformedReply", err)
	}
}

// TestServe_NoReplyOntoOwnSubjects: a request whose reply subject lies
// under the API's own subjects gets no answer, while the same request
// with an inbox is answered.
func TestServe_NoReplyOntoOwnSubjects(t *testing.T) {
	f := newFixture(t)
	sub, err := f.nc.SubscribeSync("driftfit.api.>")
	if err != nil {
		t.Fatal(err)
	}
	if err := f.nc.Flush(); err != nil {
		t.Fatal(err)
	}
	msg := nats.NewMsg(readapi.TicketsSubject)
	msg.Reply = "driftfit.api.tickets"
	msg.Data = []byte(`{}`)
	if err := f.nc.PublishMsg(msg); err != nil {
		t.Fatal(err)
	}
	// The subscription sees the request itself; an answer would follow.
	for {
		m, err := sub.NextMsg(500 * time.Millisecond)
		if err != nil {
			break
		}
		if m.Header.Get(readapi.HeaderMore) != "" || (m.Reply == "" && string(m.Data) != `{}`) {
			t.Fatalf("the service answered onto its own subject: %q", m.Data)
		}
	}
	if _, err := f.nc.Request(readapi.TicketsSubject, []byte(`{}`), readapi.Timeout); err != nil {
		t.Errorf("the same request with an inbox: %v", err)
	}
}
