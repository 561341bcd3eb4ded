package ingest_test

import (
	"encoding/binary"
	"encoding/json"
	"errors"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"driftfit/alert"
	"driftfit/ingest"
	"driftfit/store"
)

// calibrationRequest sends body as a calibration of id and returns the
// service's reply. A service just (re)started may not subscribe yet
// (the stream it waits for outlives it): no responders is tried again
// for up to 10 s.
func calibrationRequest(t *testing.T, nc *nats.Conn, id, body string) ingest.CalibrationReply {
	t.Helper()
	var m *nats.Msg
	var err error
	for deadline := time.Now().Add(10 * time.Second); ; time.Sleep(10 * time.Millisecond) {
		m, err = nc.Request("driftfit.calibrations."+id, []byte(body), 10*time.Second)
		if !errors.Is(err, nats.ErrNoResponders) || time.Now().After(deadline) {
			break
		}
	}
	if err != nil {
		t.Fatalf("calibration %s %s: %v", id, body, err)
	}
	var ans ingest.CalibrationReply
	if err := json.Unmarshal(m.Data, &ans); err != nil {
		t.Fatalf("calibration %s %s: reply %q: %v", id, body, m.Data, err)
	}
	return ans
}

// mustCalibrate is calibrationRequest that fails the test unless the
// reply is ok with a record.
func mustCalibrate(t *testing.T, nc *nats.Conn, id, body string) ingest.CalibrationRecord {
	t.Helper()
	ans := calibrationRequest(t, nc, id, body)
	if !ans.OK || ans.Record == nil {
		t.Fatalf("calibration %s %s: reply %+v, want ok with a record", id, body, ans)
	}
	return *ans.Record
}

// storedCalibrations returns the records of id in the file.
func storedCalibrations(t *testing.T, db *store.DB, id string) []ingest.CalibrationRecord {
	t.Helper()
	var out []ingest.CalibrationRecord
	err := db.Calibrations(id, func(_ string, _ uint64, data []byte) error {
		r, err := ingest.DecodeCalibrationRecord(data)
		out = append(out, r)
		return err
	})
	if err != nil {
		t.Fatal(err)
	}
	return out
}

// storedTicket returns the ticket id as stored.
func storedTicket(t *testing.T, db *store.DB, id string) alert.Ticket {
	t.Helper()
	var tk alert.Ticket
	found := false
	err := db.Tickets(func(k string, data []byte) error {
		if k == id {
			found = true
			return json.Unmarshal(data, &tk)
		}
		return nil
	})
	if err != nil || !found {
		t.Fatalf("ticket %s: found %v, %v", id, found, err)
	}
	return tk
}

// storedCentre returns the centre of the tolerance band in the sensor's
// stored alert state: the state is the tracker's encoding after a
// uvarint count of (uvarint span, uvarint pane, varint time) marks.
func storedCentre(t *testing.T, db *store.DB, id string, r alert.Rule) float64 {
	t.Helper()
	var state []byte
	_ = db.AlertStates(func(k string, v []byte) error {
		if k == id {
			state = append([]byte(nil), v...)
		}
		return nil
	})
	n, k := binary.Uvarint(state)
	state = state[k:]
	for range n {
		for _, signed := range []bool{false, false, true} {
			if signed {
				_, k = binary.Varint(state)
			} else {
				_, k = binary.Uvarint(state)
			}
			state = state[k:]
		}
	}
	tr, err := alert.NewTracker(id, r)
	if err != nil {
		t.Fatal(err)
	}
	if err := tr.UnmarshalBinary(state); err != nil {
		t.Fatal(err)
	}
	v, ok := tr.AsLeft()
	if !ok {
		t.Fatalf("sensor %s: stored state has no centre", id)
	}
	return v
}

// TestService_VoidCalibration records a calibration that closes a
// ticket, voids it, and checks what the reply promises is in the file
// when it comes: the record marked voided, the ticket reopened with its
// amendment and published again under an id of its own, the centre back
// to the one before, and readings older than the voided calibration
// taken again. Mistaken voids are refused, naming the calibration. A
// second calibration dated before the voided one is taken, and after a
// restart of the service it is corrected.
func TestService_VoidCalibration(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	rule := ptRule(5, 1)
	h := startAlertService(t, ns.ClientURL(), dir, rule, "", nil)
	tickets, err := h.nc.SubscribeSync("driftfit.tickets")
	if err != nil {
		t.Fatal(err)
	}
	rejected, err := h.nc.SubscribeSync("driftfit.rejected")
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
	id := "qm.u1.steam.pt-102"
	t0 := time.Date(2026, 9, 1, 0, 0, 0, 0, time.UTC)
	publishDrift(t, js, id, t0)
	m, err := tickets.NextMsg(20 * time.Second)
	if err != nil {
		t.Fatalf("no ticket: %v", err)
	}
	var opened alert.Ticket
	if err := json.Unmarshal(m.Data, &opened); err != nil {
		t.Fatal(err)
	}
	msgIDs := map[string]bool{m.Header.Get(nats.MsgIdHdr): true}
	waitFor(t, "the readings applied", func() bool { return h.svc.Stats().Applied == 24*6 })
	centre := storedCentre(t, h.db, id, rule) // the level of the first judged fit: the rule has no as_left

	tc := t0.Add(24 * 6 * time.Hour)
	rec := mustCalibrate(t, h.nc, id, `{"t": "`+tc.Format(time.RFC3339)+`", "as_found": 511.9, "as_left": 500.1}`)
	if rec.Seq != 1 || rec.Status != ingest.CalibrationRecorded || !rec.Time.Equal(tc) || !reflect.DeepEqual(rec.Closed, []string{opened.ID}) {
		t.Fatalf("calibration record %+v, want number 1 at %v closing %s", rec, tc, opened.ID)
	}
	closed := storedTicket(t, h.db, opened.ID)
	publishJS(t, js, id, tc.Add(-30*time.Minute), 512)
	if r, err := rejected.NextMsg(10 * time.Second); err != nil || r.Header.Get(ingest.HeaderReason) != "too_old" {
		t.Fatalf("reading before the calibration: dead letter %v, %v; want too_old", r, err)
	}

	// A void with a value, or of a calibration that is not there, is
	// refused and changes nothing.
	for _, c := range []struct{ id, body, want string }{
		{id, `{"void": 1, "as_left": 3}`, "as_left 3: not taken with void"},
		{id, `{"void": 4}`, `calibration 4 of sensor "qm.u1.steam.pt-102": none recorded: its calibrations are numbered 1 to 1`},
		{"qm.u1.steam.pt-1o2", `{"void": 1}`, `calibration 1 of sensor "qm.u1.steam.pt-1o2": none recorded: the service holds no state`},
		{id, `{"void": 1, "correct": 1}`, "give one"},
		{id, `{"as_found": 1, "as_left": 1, "reason": "why"}`, `reason "why": taken only with void or correct`},
		{id, `{"as_left": 1}`, "as_found: missing"},
		{id, `{"void": 1, "reason": "bell\u0007"}`, "not printable"},
	} {
		if ans := calibrationRequest(t, h.nc, c.id, c.body); ans.OK || !strings.Contains(ans.Error, c.want) {
			t.Errorf("calibration %s %s: reply %+v, want an error with %q", c.id, c.body, ans, c.want)
		}
	}

	reason := "recorded against the wrong transmitter"
	v := mustCalibrate(t, h.nc, id, `{"void": 1, "reason": "`+reason+`"}`)
	if v.Seq != 1 || v.Status != ingest.CalibrationVoided || v.Reason != reason || v.Changed.IsZero() || !reflect.DeepEqual(v.Reopened, []string{opened.ID}) {
		t.Fatalf("void reply record %+v, want number 1 voided, ticket %s reopened", v, opened.ID)
	}
	// In the file when the reply came.
	if got := storedCalibrations(t, h.db, id); len(got) != 1 || !reflect.DeepEqual(got[0], v) {
		t.Errorf("stored records %+v, want the voided one", got)
	}
	re := storedTicket(t, h.db, opened.ID)
	if re.Calibration != nil || re.Revision != closed.Revision+1 || len(re.Amendments) != 1 ||
		re.Amendments[0].Action != alert.AmendVoided || re.Amendments[0].Reason != reason || re.Amendments[0].Calibration != *closed.Calibration {
		t.Errorf("stored ticket after the void %+v, want it open again, one revision on, with the void", re)
	}
	if c := storedCentre(t, h.db, id, rule); c != centre {
		t.Errorf("centre after the void %v, want %v as before the calibration (not its as-left 500.1)", c, centre)
	}
	if ans := calibrationRequest(t, h.nc, id, `{"void": 1}`); ans.OK || !strings.Contains(ans.Error, "already voided at") {
		t.Errorf("second void: reply %+v, want already voided", ans)
	}
	// The voided calibration's cutoff is gone: an older reading is taken
	// now (the one refused before is not brought back).
	applied := h.svc.Stats().Applied
	publishJS(t, js, id, tc.Add(-20*time.Minute), 512)
	waitFor(t, "a reading before the voided calibration applied", func() bool { return h.svc.Stats().Applied == applied+1 })
	// Every version of the ticket went out under an id of its own:
	// opened, revisions, closed, reopened.
	var reopenedOnBus bool
	collect := func(until func(alert.Ticket) bool) {
		t.Helper()
		for {
			m, err := tickets.NextMsg(10 * time.Second)
			if err != nil {
				t.Fatalf("ticket versions on the bus: %v", err)
			}
			var tk alert.Ticket
			if err := json.Unmarshal(m.Data, &tk); err != nil {
				t.Fatal(err)
			}
			mid := m.Header.Get(nats.MsgIdHdr)
			if msgIDs[mid] {
				t.Errorf("ticket revision %d published under a repeated id %q", tk.Revision, mid)
			}
			msgIDs[mid] = true
			if until(tk) {
				return
			}
		}
	}
	collect(func(tk alert.Ticket) bool {
		reopenedOnBus = tk.Calibration == nil && len(tk.Amendments) == 1
		return reopenedOnBus
	})

	// A calibration dated before the voided one is taken and closes the
	// reopened ticket.
	tc2 := tc.Add(-10 * time.Minute)
	rec2 := mustCalibrate(t, h.nc, id, `{"t": "`+tc2.Format(time.RFC3339)+`", "as_found": 511.5, "as_left": 500}`)
	if rec2.Seq != 2 || !reflect.DeepEqual(rec2.Closed, []string{opened.ID}) {
		t.Fatalf("calibration after the void %+v, want number 2 closing %s", rec2, opened.ID)
	}
	collect(func(tk alert.Ticket) bool { return tk.Calibration != nil && tk.Calibration.AsFound == 511.5 })

	// The records hold across a restart: correct number 2.
	h.stop()
	h = startAlertService(t, ns.ClientURL(), dir, rule, "", nil)
	fixReason := "as-left misread"
	c := mustCalibrate(t, h.nc, id, `{"correct": 2, "as_found": 511.5, "as_left": 500.2, "reason": "`+fixReason+`"}`)
	if c.Seq != 3 || c.Corrects != 2 || !c.Time.Equal(tc2) || c.AsLeft != 500.2 || !reflect.DeepEqual(c.Closed, []string{opened.ID}) {
		t.Fatalf("correction %+v, want number 3 correcting 2, its time %v kept, as-left 500.2", c, tc2)
	}
	got := storedCalibrations(t, h.db, id)
	if len(got) != 3 || got[0].Status != ingest.CalibrationVoided || got[1].Status != ingest.CalibrationCorrected ||
		got[1].CorrectedBy != 3 || got[1].Reason != fixReason || got[1].AsLeft != 500 || !reflect.DeepEqual(got[2], c) {
		t.Errorf("stored records %+v, want 1 voided, 2 corrected by 3, 3 in force", got)
	}
	tk := storedTicket(t, h.db, opened.ID)
	if tk.Calibration == nil || tk.Calibration.AsLeft != 500.2 || len(tk.Amendments) != 2 || tk.Amendments[1].Action != alert.AmendCorrected ||
		tk.Amendments[1].Calibration.AsLeft != 500 || tk.Revision != closed.Revision+2 {
		t.Errorf("stored ticket after the correction %+v, want closed by the correction with two amendments", tk)
	}
	if c := storedCentre(t, h.db, id, rule); c != 500.2 {
		t.Errorf("centre after the correction %v, want 500.2", c)
	}
	for _, body := range []string{`{"void": 2}`, `{"correct": 2, "as_found": 1, "as_left": 1}`} {
		if ans := calibrationRequest(t, h.nc, id, body); ans.OK || !strings.Contains(ans.Error, "already corrected at") || !strings.Contains(ans.Error, "by calibration 3") {
			t.Errorf("%s after the correction: reply %+v, want already corrected by 3", body, ans)
		}
	}
}

// TestService_CorrectCalibration_Time moves a calibration's time by
// corrections: later restarts the fits from the new time (a reading
// between the two is refused), earlier moves the cutoff back without a
// restart (a reading between the two is taken); a correction may not go
// before the calibration in force before it.
func TestService_CorrectCalibration_Time(t *testing.T) {
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	h := startAlertService(t, ns.ClientURL(), dir, ptRule(5, 1), "", nil)
	rejected, err := h.nc.SubscribeSync("driftfit.rejected")
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
	id := "qm.u2.feed.pt-201"
	t0 := time.Date(2026, 9, 1, 0, 0, 0, 0, time.UTC)
	applied := uint64(0)
	publish := func(at time.Time) {
		t.Helper()
		publishJS(t, js, id, at, 500)
	}
	taken := func(at time.Time) {
		t.Helper()
		publish(at)
		applied++
		waitFor(t, "the reading at "+at.Format(time.TimeOnly)+" applied", func() bool { return h.svc.Stats().Applied == applied })
	}
	refused := func(at time.Time) {
		t.Helper()
		publish(at)
		r, err := rejected.NextMsg(10 * time.Second)
		if err != nil || r.Header.Get(ingest.HeaderReason) != "too_old" {
			t.Fatalf("reading at %v: dead letter %v, %v; want too_old", at, r, err)
		}
	}
	for hr := range 10 {
		taken(t0.Add(time.Duration(hr) * time.Hour))
	}
	tc := t0.Add(10 * time.Hour)
	mustCalibrate(t, h.nc, id, `{"t": "`+tc.Format(time.RFC3339)+`", "as_found": 500.5, "as_left": 500}`)
	for hr := 1; hr <= 3; hr++ {
		taken(tc.Add(time.Duration(hr) * time.Hour))
	}
	// Later: the work was finished at 12:30, not 10:00.
	later := tc.Add(150 * time.Minute)
	c := mustCalibrate(t, h.nc, id, `{"correct": 1, "t": "`+later.Format(time.RFC3339)+`", "as_found": 500.5, "as_left": 500}`)
	if c.Seq != 2 || !c.Time.Equal(later) {
		t.Fatalf("correction to a later time %+v, want number 2 at %v", c, later)
	}
	refused(tc.Add(135 * time.Minute))
	taken(tc.Add(165 * time.Minute)) // the fits restarted: windows empty, so taken though older than 13:00
	// Earlier: 11:30 after all; no restart, the cutoff moves back.
	earlier := tc.Add(90 * time.Minute)
	mustCalibrate(t, h.nc, id, `{"correct": 2, "t": "`+earlier.Format(time.RFC3339)+`", "as_found": 500.5, "as_left": 500}`)
	taken(tc.Add(120 * time.Minute))
	refused(tc.Add(60 * time.Minute))
	// A new calibration at 14:00: its correction may not go before 11:30.
	mustCalibrate(t, h.nc, id, `{"t": "`+tc.Add(4*time.Hour).Format(time.RFC3339)+`", "as_found": 500.5, "as_left": 500}`)
	if ans := calibrationRequest(t, h.nc, id, `{"correct": 4, "t": "`+tc.Add(time.Hour).Format(time.RFC3339)+`", "as_found": 1, "as_left": 1}`); ans.OK ||
		!strings.Contains(ans.Error, "before the calibration in force before it") {
		t.Errorf("correction to before the previous calibration: reply %+v, want refused", ans)
	}
	if ans := calibrationRequest(t, h.nc, id, `{"correct": 3, "as_found": 1, "as_left": 1}`); ans.OK || !strings.Contains(ans.Error, "calibration 4 was recorded after it: void or correct 4 first") {
		t.Errorf("correction of a calibration followed by another: reply %+v, want refused", ans)
	}
	// Through the Go API: void 4, and 3 is in force again.
	if _, err := h.svc.VoidCalibration(t.Context(), id, 4, ""); err != nil {
		t.Fatal(err)
	}
	r, err := h.svc.CorrectCalibration(t.Context(), id, 3, alert.Calibration{AsFound: 500.6, AsLeft: 500}, "as-found rounded")
	if err != nil || r.Seq != 5 || r.Corrects != 3 || !r.Time.Equal(earlier) {
		t.Errorf("CorrectCalibration(3) = %+v, %v; want number 5 at %v", r, err, earlier)
	}

	// Dropped with serve stopped, the sensor starts afresh: its records
	// are kept, but none can be withdrawn into the fresh state.
	h.stop()
	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := db.DropSensor(id); err != nil {
		t.Fatal(err)
	}
	db.Close()
	h = startAlertService(t, ns.ClientURL(), dir, ptRule(5, 1), "", nil)
	if js, err = h.nc.JetStream(); err != nil {
		t.Fatal(err)
	}
	publishJS(t, js, id, tc.Add(5*time.Hour), 500)
	waitFor(t, "the dropped sensor's new reading applied", func() bool { return h.svc.Stats().Applied > 0 })
	_, err = h.svc.VoidCalibration(t.Context(), id, 5, "")
	var ref *ingest.CalibrationRefError
	if !errors.As(err, &ref) || !errors.Is(err, ingest.ErrNotInForce) || !strings.Contains(err.Error(), "no longer holds it") {
		t.Errorf("void after drop-sensor: %v, want ErrNotInForce: the state no longer holds it", err)
	}
	if got := storedCalibrations(t, h.db, id); len(got) != 5 {
		t.Errorf("%d records after drop-sensor, want the 5 kept", len(got))
	}
}
