package ingest_test

import (
	"errors"
	"fmt"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	dto "github.com/prometheus/client_model/go"

	"driftfit/ingest"
	"driftfit/store"
)

func TestCheckSensorID(t *testing.T) {
	cases := []struct {
		name, id string
		ok       bool
	}{
		{"plain", "qm.u1.steam.pt-101", true},
		{"one token", "pt101", true},
		{"non-ASCII letters", "qm.kühlwasser.tt-7", true},
		{"the store's limit", strings.Repeat("a", store.MaxSensorID), true},
		{"empty", "", false},
		{"one byte over the store's limit", strings.Repeat("a", store.MaxSensorID+1), false},
		{"NUL", "qm.pt\x00x", false},
		{"terminal escape", "qm.\x1b[2Jpt", false},
		{"DEL", "qm.pt\x7f", false},
		{"C1 control", "qm.pt\u0085", false},
		{"bidi override", "qm.pt\u202e1", false},
		{"space", "qm.pt 1", false},
		{"invalid UTF-8", "qm.pt\xff", false},
		{"star", "qm.*.pt", false},
		{"star inside a token", "qm.p*t", false},
		{"gt", "qm.>", false},
		{"leading dot", ".qm.pt", false},
		{"trailing dot", "qm.pt.", false},
		{"empty token", "qm..pt", false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			err := ingest.CheckSensorID(c.id)
			if (err == nil) != c.ok {
				t.Fatalf("CheckSensorID(%s) = %v, want ok %v", ingest.QuoteID(c.id), err, c.ok)
			}
			if err == nil {
				return
			}
			var ie *ingest.SensorIDError
			if !errors.Is(err, ingest.ErrSensorID) || !errors.As(err, &ie) || ie.ID != c.id {
				t.Errorf("CheckSensorID(%s) = %#v, want a *SensorIDError for the id wrapping ErrSensorID", ingest.QuoteID(c.id), err)
			}
			if msg := err.Error(); strings.ContainsAny(msg, "\x00\x1b\x7f\u0085\u202e") || len(msg) > 600 {
				t.Errorf("error text %q holds raw control bytes or is %d bytes long", msg, len(msg))
			}
		})
	}
}

func TestQuoteID(t *testing.T) {
	long := strings.Repeat("é", 200) // 400 bytes: cut inside the 129th rune
	for _, c := range []struct{ in, want string }{
		{"qm.pt-1", `"qm.pt-1"`},
		{"qm.\x1b[31mred", `"qm.\x1b[31mred"`},
		{"a\x00b", `"a\x00b"`},
		{"\xff", `"\xff"`},
		{"pt\u202e1", `"pt\u202e1"`},
		{long, `"` + strings.Repeat("é", 128) + `"…(400 bytes)`},
	} {
		if got := ingest.QuoteID(c.in); got != c.want {
			t.Errorf("QuoteID(%q) = %s, want %s", c.in, got, c.want)
		}
	}
}

func rejectedCount(t *testing.T, m *ingest.Metrics, reason string) float64 {
	t.Helper()
	var pm dto.Metric
	if err := m.Rejected.WithLabelValues(reason).Write(&pm); err != nil {
		t.Fatal(err)
	}
	return pm.GetCounter().GetValue()
}

// TestService_HostileSubjects publishes readings on subjects whose sensor
// id holds a NUL byte, a terminal escape, invalid UTF-8 or 5000 bytes (on a
// server that allows such long subjects), between good readings, and
// checks that serve keeps running, dead-letters each as bad_sensor_id with
// the subject quoted, applies every good reading, and commits past them.
// A reading on <prefix>.rejected, no longer the dead-letter subject, is
// an ordinary sensor's.
func TestService_HostileSubjects(t *testing.T) {
	dir := t.TempDir()
	ns := natsServerWith(t, &server.Options{StoreDir: filepath.Join(dir, "nats"), MaxControlLine: 16 << 10})
	defer ns.Shutdown()
	h := startService(t, ns.ClientURL(), dir, ingest.ModeStream)
	waitStream(t, h.nc)
	dl, err := h.nc.SubscribeSync(ingest.DefaultRejectedSubject("driftfit.in"))
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
	at := time.Now().Add(-time.Hour).Unix()
	var last uint64
	pub := func(subject string, i int) {
		t.Helper()
		ack, err := js.Publish(subject, fmt.Appendf(nil, `{"t":%d,"v":%d}`, at+int64(i), i))
		if err != nil {
			t.Fatalf("publish on %s: %v", ingest.QuoteID(subject), err)
		}
		last = ack.Sequence
	}
	bad := []string{"qm.h.pt\x00x", "qm.h.\x1b[31mred", "qm.h.pt\xff", strings.Repeat("a", 5000)}
	good := 0
	for i, id := range bad {
		pub("driftfit.in.qm.h.good", 2*i)
		good++
		pub("driftfit.in."+id, 2*i+1)
	}
	pub("driftfit.in.rejected", 100)
	pub("driftfit.in.qm.h.good", 101)
	good += 2

	seen := map[string]bool{}
	for range bad {
		m, err := dl.NextMsg(10 * time.Second)
		if err != nil {
			t.Fatalf("dead letters so far %v: %v", seen, err)
		}
		if r := m.Header.Get(ingest.HeaderReason); r != "bad_sensor_id" {
			t.Errorf("dead letter reason %q, want bad_sensor_id", r)
		}
		subj := m.Header.Get(ingest.HeaderSubject)
		if strings.ContainsAny(subj, "\x00\x1b") || len(subj) > 400 {
			t.Errorf("dead-letter subject header %q not quoted", subj)
		}
		seen[subj] = true
	}
	waitFor(t, "good readings applied", func() bool { return h.svc.Stats().Applied == uint64(good) })
	if n := rejectedCount(t, h.m, "bad_sensor_id"); n != float64(len(bad)) {
		t.Errorf("rejected{reason=bad_sensor_id} = %v, want %d", n, len(bad))
	}
	waitFor(t, "position committed", func() bool { return h.svc.Stats().Position == last })
	h.stop()
	select {
	case err := <-h.done:
		t.Fatalf("Run returned %v early", err)
	default:
	}
	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if pos, err := db.Position(); err != nil || pos != last {
		t.Errorf("stored position %d (%v), want %d", pos, err, last)
	}
}

// TestService_MaxSensors checks the sensor cap: 5000 distinct ids whose
// every payload is refused hold no route, so 50 good ids still fit under
// a cap of 50, and the 51st is refused as too_many_sensors while the
// known ones keep being applied.
func TestService_MaxSensors(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	h := startServiceWith(t, ns.ClientURL(), dir, ingest.ModeDirect, func(o *ingest.Options) { o.MaxSensors = 50 })
	at := time.Now().Add(-time.Hour).Unix()
	waitFor(t, "subscription", func() bool {
		_ = h.nc.Publish("driftfit.in.probe.bad", []byte(`{`))
		_ = h.nc.Flush()
		time.Sleep(5 * time.Millisecond)
		return h.svc.Stats().Rejected > 0
	})
	base := h.svc.Stats().Rejected
	const badIDs = 5000
	for i := range badIDs {
		if err := h.nc.Publish(fmt.Sprintf("driftfit.in.qm.bad.pt-%d", i), []byte(`{"t":`)); err != nil {
			t.Fatal(err)
		}
	}
	waitFor(t, "bad payloads refused", func() bool { return h.svc.Stats().Rejected == base+badIDs })
	// Their routes go with the next sweep: none of them made a sensor.
	waitFor(t, "routes of refused ids forgotten", func() bool { return h.svc.Stats().Routes == 0 })
	for i := range 50 {
		if err := h.nc.Publish(fmt.Sprintf("driftfit.in.qm.good.pt-%d", i), fmt.Appendf(nil, `{"t":%d,"v":1}`, at)); err != nil {
			t.Fatal(err)
		}
	}
	waitFor(t, "50 sensors", func() bool { return h.svc.Stats().Applied == 50 })
	if err := h.nc.Publish("driftfit.in.qm.good.pt-50", fmt.Appendf(nil, `{"t":%d,"v":1}`, at)); err != nil {
		t.Fatal(err)
	}
	if err := h.nc.Publish("driftfit.in.qm.good.pt-0", fmt.Appendf(nil, `{"t":%d,"v":2}`, at+1)); err != nil {
		t.Fatal(err)
	}
	waitFor(t, "51st refused, known one applied", func() bool {
		return rejectedCount(t, h.m, "too_many_sensors") == 1 && h.svc.Stats().Applied == 51
	})
	if st := h.svc.Stats(); st.Sensors != 50 || st.Routes != 50 {
		t.Errorf("Stats.Sensors = %d, Routes = %d, want 50 each", st.Sensors, st.Routes)
	}
}

func counterValue(t *testing.T, c interface{ Write(*dto.Metric) error }) float64 {
	t.Helper()
	var pm dto.Metric
	if err := c.Write(&pm); err != nil {
		t.Fatal(err)
	}
	return pm.GetCounter().GetValue()
}

// FuzzCheckSensorID checks on any id that CheckSensorID never panics,
// that an accepted id is a store key and prints as itself (QuoteID is
// strconv.Quote of it), and that QuoteID never lets a control byte
// through, whatever the id.
func FuzzCheckSensorID(f *testing.F) {
	for _, s := range []string{"qm.u1.steam.pt-101", "qm.pt\x00x", "qm.\x1b[2Jpt", "qm..pt", "qm.*", "\xff", "kühl.tt-1"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, id string) {
		q := ingest.QuoteID(id)
		for i := 0; i < len(q); i++ {
			if c := q[i]; c < 0x20 || c == 0x7f {
				t.Fatalf("QuoteID(%q) = %q holds byte %#x", id, q, c)
			}
		}
		if ingest.CheckSensorID(id) != nil {
			return
		}
		if len(id) > store.MaxSensorID || strings.IndexByte(id, 0) >= 0 || strings.ContainsAny(id, "*> \t\r\n") || strings.Contains(id, "..") {
			t.Fatalf("CheckSensorID accepted %q", id)
		}
		if len(id) <= 256 && q != strconv.Quote(id) {
			t.Fatalf("QuoteID(%q) = %s, want %s", id, q, strconv.Quote(id))
		}
	})
}
