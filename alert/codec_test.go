package alert_test

import (
	"bytes"
	"encoding/json"
	"errors"
	"os"
	"path/filepath"
	"reflect"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

// scenarioRule: a differential-pressure transmitter class with slope and
// lead-time limits, raising on the first breach.
func scenarioRule() alert.Rule {
	r := alert.DefaultRule()
	r.Class, r.Unit = "dp-transmitter", "kPa"
	r.SpanLower, r.SpanUpper = 0, 250
	r.Tolerance = 1
	r.AsLeft, r.HasAsLeft = 100, true
	r.Windows = []rolling.WindowSpec{oneDay, month}
	r.Debounce = 1
	r.Limits.Slope = alert.RateLimit{Warning: 0.1, Critical: 0.2}
	r.Limits.LeadTime = alert.DurationLimit{Warning: 30 * day, Critical: 7 * day}
	r.Detect.Silent = 6 * time.Hour
	return r
}

// scenario drives a tracker to a state with a firing alert, a cleared
// one and an open ticket, and returns the events and the ticket.
//
// The month window's line is at 100 kPa, the as-left value, drifting at
// 0.15 kPa/d: it leaves the ±1 kPa band in 1/0.15 = 6.667 days, so the
// ticket falls due 6.667 − 7 < 0 days ahead, i.e. at once.
func scenario(t testing.TB) (*alert.Tracker, []alert.Event, alert.Ticket) {
	t.Helper()
	tr := mustTracker(t, "qm.u2.dp-7", scenarioRule())
	var events []alert.Event
	var ticket alert.Ticket
	eval := func(now time.Time, sol rolling.Solution) {
		d, err := tr.Evaluate(now, &sol)
		if err != nil {
			t.Fatal(err)
		}
		events = append(events, d.Events...)
		if d.Opened != nil {
			ticket = *d.Opened
		}
	}
	eval(t0, lineSol(month, t0, warnC1, se))
	eval(t0.Add(time.Hour), lineSol(oneDay, t0.Add(time.Hour), critC1, se))
	eval(t0.Add(2*time.Hour), lineSol(oneDay, t0.Add(2*time.Hour), clearC1, se))
	if ticket.ID == "" {
		t.Fatal("scenario opened no ticket")
	}
	return tr, events, ticket
}

func TestTracker_Ticket_DueDate(t *testing.T) {
	_, _, tk := scenario(t)
	// Exit at 1/0.15 days after t0 (the fit's newest reading).
	wantExit := t0.Add(time.Duration(float64(day) / warnC1))
	if d := tk.Exit.Sub(wantExit); d < -time.Second || d > time.Second {
		t.Errorf("ticket exit %v, want %v (1/0.15 days)", tk.Exit, wantExit)
	}
	// Fieller's one-sided 95% lower bound (exit 5.98 days) minus the
	// 7-day margin is before opening: due at once (TestTracker_Ticket_DueFromLowerBound
	// works the bound out).
	if !tk.Due.Equal(t0) || tk.DueBasis != alert.DueExitLowerBound || tk.Edge != "upper" {
		t.Errorf("ticket due %v (%s, edge %s), want %v: the exit's lower bound minus 7 days is before opening", tk.Due, tk.DueBasis, tk.Edge, t0)
	}
	// At Due = t0 (τ = 0) the deviation is c0 − as-left = 0, and the
	// interval is ±t·√(ResidSD² + SE0²) = ±2.048407·√(0.05² + 0.01²).
	if tk.AsFound.Deviation != 0 || tk.AsFound.High <= 0.104 || tk.AsFound.High >= 0.105 {
		t.Errorf("as-found %+v, want 0 ± 0.10446", tk.AsFound)
	}
}

func TestTracker_Calibrate_ClosesTicketAndResets(t *testing.T) {
	tr, _, tk := scenario(t)
	cal := alert.Calibration{Time: t0.Add(5 * day), AsFound: 100.8, AsLeft: 100.05}
	d, err := tr.Calibrate(cal)
	if err != nil {
		t.Fatal(err)
	}
	if d.Closed == nil || d.Closed.ID != tk.ID || d.Closed.Calibration == nil || *d.Closed.Calibration != cal {
		t.Errorf("Calibrate closed %+v, want ticket %s with the calibration", d.Closed, tk.ID)
	}
	// Firing before: slope and lead time on the month window, lead time
	// on the day window (its slope alert cleared).
	var got []string
	for _, e := range d.Events {
		got = append(got, e.Type.String()+" "+e.Window+" "+e.Kind.String())
	}
	want := []string{"reset 30d/1d slope", "reset 30d/1d lead_time", "reset 1d/1h lead_time"}
	if !reflect.DeepEqual(got, want) {
		t.Errorf("Calibrate events %q, want %q", got, want)
	}
	if _, open := tr.Ticket(); open {
		t.Error("ticket still open after calibration")
	}
	if v, ok := tr.AsLeft(); !ok || v != 100.05 {
		t.Errorf("AsLeft = %v, %v; want 100.05", v, ok)
	}
	if len(tr.Alerts()) != 0 {
		t.Errorf("alerts after calibration %+v, want none", tr.Alerts())
	}
}

func TestTracker_MarshalBinary_RoundTrip(t *testing.T) {
	tr, _, _ := scenario(t)
	b, err := tr.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	back := mustTracker(t, "qm.u2.dp-7", scenarioRule())
	if err := back.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(tr, back) {
		t.Errorf("round trip differs:\n got %+v\nwant %+v", back, tr)
	}
	b2, _ := back.MarshalBinary()
	if !bytes.Equal(b, b2) {
		t.Error("re-encoding differs")
	}
	// Every shorter prefix is an error, never a panic.
	for n := range len(b) {
		if err := back.UnmarshalBinary(b[:n]); !errors.Is(err, alert.ErrBadState) {
			t.Fatalf("UnmarshalBinary(%d of %d bytes) error = %v, want ErrBadState", n, len(b), err)
		}
	}
	other := mustTracker(t, "qm.u2.dp-8", scenarioRule())
	if err := other.UnmarshalBinary(b); !errors.Is(err, alert.ErrBadState) {
		t.Errorf("UnmarshalBinary(state of another sensor) error = %v, want ErrBadState", err)
	}
	compareGolden(t, "state.golden", b)
}

// TestTracker_UnmarshalBinary_Version1 decodes a state written by
// version 1 of the encoding (testdata/state_v1.golden, the scenario's
// state before tickets had revisions): the ticket keeps its fields, its
// estimates date from its opening, and it re-encodes as version 2.
func TestTracker_UnmarshalBinary_Version1(t *testing.T) {
	b, err := os.ReadFile(filepath.Join("testdata", "state_v1.golden"))
	if err != nil {
		t.Fatal(err)
	}
	tr := mustTracker(t, "qm.u2.dp-7", scenarioRule())
	if err := tr.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	tk, open := tr.Ticket()
	if !open || tk.ID != "qm.u2.dp-7@20260302T000000Z" || tk.DueBasis != "predicted_exit" || !tk.Due.Equal(t0) {
		t.Fatalf("version 1 ticket %+v (open %v), want the scenario's, due %v on predicted_exit", tk, open, t0)
	}
	if tk.Revision != 0 || !tk.AsOf.Equal(tk.Opened) || tk.Overdue || tk.AsFound.Interval != alert.PredictionInterval {
		t.Errorf("version 1 ticket revision %d as of %v overdue %v interval %q, want 0, %v, false, %q",
			tk.Revision, tk.AsOf, tk.Overdue, tk.AsFound.Interval, tk.Opened, alert.PredictionInterval)
	}
	out, _ := tr.MarshalBinary()
	if out[3] != 3 {
		t.Errorf("re-encoded as version %d, want 3", out[3])
	}
}

// TestTracker_UnmarshalBinary_Version2 decodes the scenario's state as
// version 2 wrote it (testdata/state_v2.golden, before tickets had
// amendments): it re-encodes as version 3 to exactly the scenario's
// state now (state.golden), as the ticket has no amendments.
func TestTracker_UnmarshalBinary_Version2(t *testing.T) {
	v2, err := os.ReadFile(filepath.Join("testdata", "state_v2.golden"))
	if err != nil {
		t.Fatal(err)
	}
	tr := mustTracker(t, "qm.u2.dp-7", scenarioRule())
	if err := tr.UnmarshalBinary(v2); err != nil {
		t.Fatal(err)
	}
	want, _, _ := scenario(t)
	if !reflect.DeepEqual(tr, want) {
		t.Errorf("version 2 state decodes to\n %+v\nwant the scenario's\n %+v", tr, want)
	}
	out, _ := tr.MarshalBinary()
	golden, err := os.ReadFile(filepath.Join("testdata", "state.golden"))
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(out, golden) {
		t.Errorf("version 2 state re-encoded differs from state.golden:\n got %x\nwant %x", out, golden)
	}
}

// FuzzTracker_UnmarshalBinary: any bytes either fail with ErrBadState or
// decode to a state that re-encodes to exactly the same bytes (the
// encoding is canonical, so floats round-trip bit for bit), and decodes
// again to an equal tracker.
func FuzzTracker_UnmarshalBinary(f *testing.F) {
	golden, err := os.ReadFile(filepath.Join("testdata", "state.golden"))
	if err != nil {
		f.Fatal(err)
	}
	f.Add(golden)
	v1, err := os.ReadFile(filepath.Join("testdata", "state_v1.golden"))
	if err != nil {
		f.Fatal(err)
	}
	f.Add(v1)
	v2, err := os.ReadFile(filepath.Join("testdata", "state_v2.golden"))
	if err != nil {
		f.Fatal(err)
	}
	f.Add(v2)
	amended, err := os.ReadFile(filepath.Join("testdata", "state_amended.golden"))
	if err != nil {
		f.Fatal(err)
	}
	f.Add(amended)
	empty, _ := mustTracker(f, "qm.u2.dp-7", scenarioRule()).MarshalBinary()
	f.Add(empty)
	f.Add([]byte("DFA\x01"))
	// A state holding an alert kept once per sensor (zero window).
	silent := mustTracker(f, "qm.u2.dp-7", scenarioRule())
	if _, err := silent.Observe(time.Date(2026, 3, 2, 7, 0, 0, 0, time.UTC), alert.Finding{Kind: alert.Silent,
		Result: alert.Silence(time.Date(2026, 3, 2, 7, 0, 0, 0, time.UTC), time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC), 6*time.Hour)}); err != nil {
		f.Fatal(err)
	}
	withSilent, _ := silent.MarshalBinary()
	f.Add(withSilent)
	f.Fuzz(func(t *testing.T, data []byte) {
		tr := mustTracker(t, "qm.u2.dp-7", scenarioRule())
		if err := tr.UnmarshalBinary(data); err != nil {
			if !errors.Is(err, alert.ErrBadState) {
				t.Fatalf("error %v does not wrap ErrBadState", err)
			}
			return
		}
		out, err := tr.MarshalBinary()
		if err != nil {
			t.Fatal(err)
		}
		// Older versions decode and re-encode as version 3.
		if data[3] == 3 && !bytes.Equal(out, data) {
			t.Fatalf("re-encoding differs:\n in  %x\n out %x", data, out)
		}
		again := mustTracker(t, "qm.u2.dp-7", scenarioRule())
		if err := again.UnmarshalBinary(out); err != nil {
			t.Fatal(err)
		}
		if !reflect.DeepEqual(tr, again) {
			t.Fatal("second decode differs")
		}
	})
}

// TestJSON_Golden pins the wire format of events and tickets.
func TestJSON_Golden(t *testing.T) {
	tr, events, tk := scenario(t)
	eb, err := json.MarshalIndent(events, "", "  ")
	if err != nil {
		t.Fatal(err)
	}
	compareGolden(t, "events.golden.json", append(eb, '\n'))
	d, err := tr.Calibrate(alert.Calibration{Time: t0.Add(5 * day), AsFound: 100.8, AsLeft: 100.05})
	if err != nil {
		t.Fatal(err)
	}
	tb, err := json.MarshalIndent([]alert.Ticket{tk, *d.Closed}, "", "  ")
	if err != nil {
		t.Fatal(err)
	}
	compareGolden(t, "tickets.golden.json", append(tb, '\n'))

	// Decoding gives back the same values (times in UTC, enums by name).
	var back []alert.Event
	if err := json.Unmarshal(eb, &back); err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(back, events) {
		t.Errorf("events JSON round trip differs:\n got %+v\nwant %+v", back, events)
	}
	var tks []alert.Ticket
	if err := json.Unmarshal(tb, &tks); err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(tks[0], tk) {
		t.Errorf("ticket JSON round trip differs:\n got %+v\nwant %+v", tks[0], tk)
	}
}

func compareGolden(t *testing.T, name string, got []byte) {
	t.Helper()
	path := filepath.Join("testdata", name)
	if *update {
		if err := os.WriteFile(path, got, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run with -update to create it)", err)
	}
	if !bytes.Equal(got, want) {
		t.Errorf("%s differs from the golden file (review, then rerun with -update):\n got %s\nwant %s", name, got, want)
	}
}
