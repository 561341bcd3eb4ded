package ingest_test

import (
	"encoding/json"
	"path/filepath"
	"sync/atomic"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"driftfit/alert"
	"driftfit/ingest"
)

// gauge returns the value of the unlabelled gauge name in reg.
func gauge(t *testing.T, reg *prometheus.Registry, name string) float64 {
	t.Helper()
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	for _, mf := range mfs {
		if mf.GetName() == name && len(mf.GetMetric()) == 1 {
			return mf.GetMetric()[0].GetGauge().GetValue()
		}
	}
	t.Fatalf("no gauge %s", name)
	return 0
}

// TestService_TicketGauges opens a ticket on a drifting sensor and reads
// driftfit_tickets_open and driftfit_tickets_overdue as the service's
// clock passes the ticket's due date (the sensor no longer reports, so
// the stored flag is never set), after a restart (counted from the
// stored tickets) and after the calibration that closes it.
func TestService_TicketGauges(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	var clock atomic.Int64
	now := func() time.Time { return time.Unix(0, clock.Load()) }
	t0 := time.Date(2026, 9, 1, 0, 0, 0, 0, time.UTC)
	clock.Store(t0.Add(7 * 24 * time.Hour).UnixNano())
	start := func() (*harness, *prometheus.Registry) {
		m := ingest.NewMetrics()
		reg := prometheus.NewRegistry()
		if err := m.Register(reg); err != nil {
			t.Fatal(err)
		}
		h := startAlertService(t, ns.ClientURL(), dir, ptRule(5, 1), "", func(o *ingest.Options) {
			o.Metrics, o.Now = m, now
		})
		return h, reg
	}
	h, reg := start()
	js, err := h.nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	id := "qm.u1.steam.pt-107"
	publishDrift(t, js, id, t0)
	var tk alert.Ticket
	waitFor(t, "a stored open ticket", func() bool {
		_ = h.db.Tickets(func(_ string, d []byte) error { return json.Unmarshal(d, &tk) })
		return tk.ID != ""
	})
	if got := gauge(t, reg, "driftfit_tickets_open"); got != 1 {
		t.Errorf("driftfit_tickets_open = %g, want 1", got)
	}
	clock.Store(tk.Due.Add(-time.Minute).UnixNano())
	if got := gauge(t, reg, "driftfit_tickets_overdue"); got != 0 {
		t.Errorf("a minute before due %v: driftfit_tickets_overdue = %g, want 0", tk.Due, got)
	}
	clock.Store(tk.Due.Add(time.Minute).UnixNano())
	if got := gauge(t, reg, "driftfit_tickets_overdue"); got != 1 {
		t.Errorf("a minute after due %v: driftfit_tickets_overdue = %g, want 1", tk.Due, got)
	}

	h.stop()
	h, reg = start()
	// The restore runs in Run: the stored ticket is counted once it is done.
	waitFor(t, "the stored ticket counted after a restart", func() bool { return gauge(t, reg, "driftfit_tickets_open") == 1 })
	if d := gauge(t, reg, "driftfit_tickets_overdue"); d != 1 {
		t.Errorf("after a restart: overdue %g, want 1", d)
	}
	at := tk.Due.Add(time.Minute).Format(time.RFC3339)
	if ans := calibrationRequest(t, h.nc, id, `{"t":"`+at+`","as_found": 511.9, "as_left": 500.1}`); !ans.OK {
		t.Fatalf("calibration reply %+v", ans)
	}
	if o, d := gauge(t, reg, "driftfit_tickets_open"), gauge(t, reg, "driftfit_tickets_overdue"); o != 0 || d != 0 {
		t.Errorf("after the calibration: open %g, overdue %g, want 0 and 0", o, d)
	}
}
