package alert_test

import (
	"bytes"
	"errors"
	"reflect"
	"testing"
	"time"

	"driftfit/alert"
)

// TestTracker_Void_ReopensTicket withdraws the calibration that closed
// the scenario's ticket: the ticket reopens as it stood, one revision on,
// with the void recorded; the centre and the calibration time go back, so
// a calibration dated before the voided one is taken.
func TestTracker_Void_ReopensTicket(t *testing.T) {
	tr, _, tk := scenario(t)
	cal := alert.Calibration{Time: t0.Add(5 * day), AsFound: 100.8, AsLeft: 100.05}
	d, err := tr.Calibrate(cal)
	if err != nil {
		t.Fatal(err)
	}
	p := d.Prior
	if p == nil || p.AsLeft != 100 || !p.HasAsLeft || !p.Calibrated.IsZero() || p.Closed == nil || p.Closed.ID != tk.ID {
		t.Fatalf("Calibrate prior %+v, want as-left 100 (the rule's), no calibration before, ticket %s", p, tk.ID)
	}
	at := t0.Add(6 * day)
	v, err := tr.Void(at, *p, "entered against the wrong tag")
	if err != nil {
		t.Fatal(err)
	}
	re := v.Reopened
	if re == nil {
		t.Fatal("Void reopened no ticket")
	}
	want := tk
	want.Revision = tk.Revision + 1
	want.Amendments = []alert.Amendment{{Action: alert.AmendVoided, At: at, Calibration: cal, Reason: "entered against the wrong tag"}}
	if !reflect.DeepEqual(*re, want) {
		t.Errorf("reopened ticket\n %+v\nwant the ticket as opened, one revision on, with the void\n %+v", *re, want)
	}
	if open, ok := tr.Ticket(); !ok || !reflect.DeepEqual(open, want) {
		t.Errorf("open ticket after Void %+v (%v), want the reopened one", open, ok)
	}
	if c, ok := tr.AsLeft(); !ok || c != 100 {
		t.Errorf("AsLeft after Void = %v, %v; want 100", c, ok)
	}
	if len(v.Events) != 0 || v.Closed != nil || v.Opened != nil {
		t.Errorf("Void decided %+v, want only the reopening", v)
	}
	// The voided calibration no longer bounds the next one.
	d2, err := tr.Calibrate(alert.Calibration{Time: t0.Add(4 * day), AsFound: 100.7, AsLeft: 100.02})
	if err != nil {
		t.Fatalf("Calibrate dated before the voided calibration: %v", err)
	}
	if d2.Closed == nil || d2.Closed.ID != tk.ID || len(d2.Closed.Amendments) != 1 || d2.Closed.Calibration.AsFound != 100.7 {
		t.Errorf("second calibration closed %+v, want the reopened ticket with its amendment", d2.Closed)
	}
}

// TestTracker_Void_KeepsNewerTicket: a ticket opened after the
// calibration carries the request for the work; the one the voided
// calibration closed stays closed.
func TestTracker_Void_KeepsNewerTicket(t *testing.T) {
	tr, _, _ := scenario(t)
	d, err := tr.Calibrate(alert.Calibration{Time: t0.Add(5 * day), AsFound: 100.8, AsLeft: 100})
	if err != nil {
		t.Fatal(err)
	}
	at := t0.Add(40 * day)
	e, err := tr.Evaluate(at, ptr(lineSol(month, at, warnC1, se)))
	if err != nil || e.Opened == nil {
		t.Fatalf("evaluation after the calibration opened %+v, %v; want a ticket", e.Opened, err)
	}
	v, err := tr.Void(at.Add(time.Hour), *d.Prior, "")
	if err != nil {
		t.Fatal(err)
	}
	if v.Reopened != nil {
		t.Errorf("Void reopened %s while %s is open", v.Reopened.ID, e.Opened.ID)
	}
	if open, ok := tr.Ticket(); !ok || open.ID != e.Opened.ID {
		t.Errorf("open ticket %s (%v), want %s", open.ID, ok, e.Opened.ID)
	}
}

// TestTracker_Correct replaces the values, then the time, of the last
// calibration, and voids the correction: the ticket records each step.
func TestTracker_Correct(t *testing.T) {
	tr, _, tk := scenario(t)
	cal := alert.Calibration{Time: t0.Add(5 * day), AsFound: 100.8, AsLeft: 10.05} // as-left mistyped
	d, err := tr.Calibrate(cal)
	if err != nil {
		t.Fatal(err)
	}
	fixed := alert.Calibration{Time: cal.Time, AsFound: 100.8, AsLeft: 100.05}
	at := t0.Add(5*day + time.Hour)
	c, err := tr.Correct(at, cal, fixed, *d.Prior, "as-left typed without its first digit")
	if err != nil {
		t.Fatal(err)
	}
	if c.Closed == nil || *c.Closed.Calibration != fixed || c.Closed.Revision != tk.Revision+1 ||
		!reflect.DeepEqual(c.Closed.Amendments, []alert.Amendment{{Action: alert.AmendCorrected, At: at, Calibration: cal, Reason: "as-left typed without its first digit"}}) {
		t.Errorf("corrected closing %+v, want the correction, one revision on, with the amendment", c.Closed)
	}
	if len(c.Events) != 0 {
		t.Errorf("correction at the same time reset %d alerts, want none", len(c.Events))
	}
	if v, _ := tr.AsLeft(); v != 100.05 {
		t.Errorf("AsLeft after the correction = %v, want 100.05", v)
	}
	if c.Prior == nil || c.Prior.Closed == nil || !reflect.DeepEqual(*c.Prior.Closed, *c.Closed) || c.Prior.AsLeft != 100 {
		t.Fatalf("correction prior %+v, want the calibration's prior with the amended ticket", c.Prior)
	}

	// A later time, then a void of the twice-corrected calibration: the
	// ticket reopens with its three amendments.
	later := alert.Calibration{Time: t0.Add(7 * day), AsFound: 100.8, AsLeft: 100.05}
	c2, err := tr.Correct(t0.Add(8*day), fixed, later, *c.Prior, "")
	if err != nil {
		t.Fatal(err)
	}
	if c2.Closed == nil || len(c2.Closed.Amendments) != 2 || *c2.Closed.Calibration != later {
		t.Errorf("second correction closed %+v, want the later calibration with two amendments", c2.Closed)
	}
	v, err := tr.Void(t0.Add(11*day), *c2.Prior, "never done")
	if err != nil {
		t.Fatal(err)
	}
	if v.Reopened == nil || v.Reopened.Revision != tk.Revision+3 || len(v.Reopened.Amendments) != 3 ||
		v.Reopened.Amendments[2].Action != alert.AmendVoided || v.Reopened.Amendments[2].Calibration != later {
		t.Fatalf("reopened %+v, want revision %d with corrected, corrected, voided", v.Reopened, tk.Revision+3)
	}
	if c, _ := tr.AsLeft(); c != 100 {
		t.Errorf("AsLeft after voiding the correction = %v, want 100 (from before the calibration)", c)
	}

	// The amendments survive the state encoding.
	b, err := tr.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	back := mustTracker(t, "qm.u2.dp-7", scenarioRule())
	if err := back.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(back, tr) {
		t.Errorf("round trip differs:\n got %+v\nwant %+v", back, tr)
	}
	if b2, _ := back.MarshalBinary(); !bytes.Equal(b, b2) {
		t.Error("re-encoding differs")
	}
	for n := range len(b) {
		if err := back.UnmarshalBinary(b[:n]); !errors.Is(err, alert.ErrBadState) {
			t.Fatalf("UnmarshalBinary(%d of %d bytes) error = %v, want ErrBadState", n, len(b), err)
		}
	}
	compareGolden(t, "state_amended.golden", b)
}

// TestTracker_Correct_LaterTime: a correction to a later time resets
// the alerts raised on readings before it and leaves a ticket opened
// since alone; none may go before the calibration before it.
func TestTracker_Correct_LaterTime(t *testing.T) {
	tr, _, _ := scenario(t)
	cal := alert.Calibration{Time: t0.Add(5 * day), AsFound: 100.8, AsLeft: 100.05}
	d, err := tr.Calibrate(cal)
	if err != nil {
		t.Fatal(err)
	}
	raisedAt := t0.Add(6 * day)
	e, err := tr.Evaluate(raisedAt, ptr(lineSol(oneDay, raisedAt, warnC1, se)))
	if err != nil || len(e.Events) == 0 || e.Opened == nil {
		t.Fatalf("evaluation after the calibration: %+v, %v; want a raise and a ticket", e, err)
	}
	later := alert.Calibration{Time: t0.Add(7 * day), AsFound: 100.8, AsLeft: 100.05}
	c, err := tr.Correct(t0.Add(8*day), cal, later, *d.Prior, "")
	if err != nil {
		t.Fatal(err)
	}
	if len(c.Events) == 0 || c.Events[0].Type != alert.Reset || !c.Events[0].At.Equal(later.Time) {
		t.Errorf("correction to a later time decided %+v, want reset events at %v", c.Events, later.Time)
	}
	if len(tr.Alerts()) != 0 {
		t.Errorf("alerts after a correction to a later time: %+v, want none", tr.Alerts())
	}
	if open, ok := tr.Ticket(); !ok || open.ID != e.Opened.ID {
		t.Errorf("open ticket %s (%v) after the correction, want %s untouched", open.ID, ok, e.Opened.ID)
	}
	cal2 := alert.Calibration{Time: t0.Add(9 * day), AsFound: 1, AsLeft: 1}
	d2, err := tr.Calibrate(cal2)
	if err != nil {
		t.Fatal(err)
	}
	before, _ := tr.MarshalBinary()
	if _, err := tr.Correct(t0.Add(10*day), cal2, alert.Calibration{Time: t0.Add(6 * day), AsFound: 1, AsLeft: 1}, *d2.Prior, ""); !errors.Is(err, alert.ErrBadCalibration) {
		t.Errorf("Correct to before the previous calibration: error %v, want ErrBadCalibration", err)
	}
	if after, _ := tr.MarshalBinary(); !bytes.Equal(before, after) {
		t.Error("state changed by a refused Correct")
	}
}

// TestTracker_Void_BadInput: the state is unchanged when Void refuses.
func TestTracker_Void_BadInput(t *testing.T) {
	tr, _, _ := scenario(t)
	d, err := tr.Calibrate(alert.Calibration{Time: t0.Add(5 * day), AsFound: 100.8, AsLeft: 100.05})
	if err != nil {
		t.Fatal(err)
	}
	before, _ := tr.MarshalBinary()
	if _, err := tr.Void(time.Time{}, *d.Prior, ""); !errors.Is(err, alert.ErrBadTime) {
		t.Errorf("Void(zero time) error = %v, want ErrBadTime", err)
	}
	if after, _ := tr.MarshalBinary(); !bytes.Equal(before, after) {
		t.Error("state changed by a refused Void")
	}
}

func ptr[T any](v T) *T { return &v }
