package report_test

import (
	"bytes"
	"encoding/csv"
	"errors"
	"strings"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/report"
)

func TestEscapeID(t *testing.T) {
	for _, tc := range []struct{ in, want string }{
		{"qm.u1.steam.pt-101", "qm.u1.steam.pt-101"},
		{"ünit.température", "ünit.température"}, // printable Unicode stays
		{"a\x1b[2Jb", `a\x1b[2Jb`},               // ESC [ 2 J clears a terminal (ECMA-48)
		{"a\tb\nc\rd", `a\tb\nc\rd`},
		{"a\x00b\x7f", `a\x00b\x7f`},
		{"a\u200bb", `a\u200bb`},   // zero-width space: invisible, so shown
		{"a\xffb", `a\xffb`},       // not UTF-8
		{`a\x1b`, `a\\x1b`},        // a backslash cannot pass for an escape
		{"\u009b31m", `\u009b31m`}, // the 8-bit CSI
	} {
		if got := report.EscapeID(tc.in); got != tc.want {
			t.Errorf("EscapeID(%q) = %q, want %q", tc.in, got, tc.want)
		}
	}
}

// TestEstimate: GUM (JCGM 100:2008) 7.2.6, the uncertainty to two
// significant digits and the estimate to the same decimal place; the
// rounding of each case is written out by hand.
func TestEstimate(t *testing.T) {
	for _, tc := range []struct {
		v, u float64
		want string
	}{
		{0.11773073985096419, 0.038025, "0.118 ±0.038"},
		{1004.7573760406842, 0.6579, "1004.76 ±0.66"},
		{1004.7573760406842, 12.34, "1005 ±12"},
		{123456.7, 1234, "123500 ±1200"},
		{-0.000123456, 0.0000456, "-0.000123 ±0.000046"},
		{2.5e-12, 1.2e-13, "2.50e-12 ±1.2e-13"},
		{3.14159, 0, "3.14159"}, // no uncertainty: 6 significant digits
	} {
		if got := report.Estimate(tc.v, tc.u); got != tc.want {
			t.Errorf("Estimate(%v, %v) = %q, want %q", tc.v, tc.u, got, tc.want)
		}
	}
	if got := report.RoundTo(0.11773073985096419, 0.038); got != 0.118 {
		t.Errorf("RoundTo = %v, want 0.118", got)
	}
}

func TestNew_Registry(t *testing.T) {
	for _, tc := range []struct {
		name string
		kind report.Kind
		want string // "" for no error
	}{
		{"table", report.Events, ""},
		{"csv", report.Fits, ""},
		{"svg", report.History, ""},
		{"png", report.Tickets, `"png" cannot write tickets: want table, csv or json`},
		{"xml", report.History, `"xml": want table, csv, json, png or svg`},
	} {
		_, err := report.New(tc.name, tc.kind, &bytes.Buffer{}, report.Options{})
		var fe *report.FormatError
		switch {
		case tc.want == "" && err != nil:
			t.Errorf("New(%s, %v) = %v", tc.name, tc.kind, err)
		case tc.want != "" && (!errors.As(err, &fe) || err.Error() != tc.want):
			t.Errorf("New(%s, %v) = %v, want a *FormatError %q", tc.name, tc.kind, err, tc.want)
		}
	}
}

// TestWriters_Events writes the same event in every text format: the
// table escapes the id and rounds, CSV (read back with encoding/csv) and
// JSON keep the id and every digit.
func TestWriters_Events(t *testing.T) {
	ev := alert.Event{Type: alert.Raised, Sensor: "qm.\x1b[31mred", Window: "30d/1d", Kind: alert.Slope, Severity: alert.Warning,
		At: time.Date(2026, 11, 1, 6, 0, 0, 0, time.UTC), Value: 0.123456, CI: [2]float64{0.1, 0.146912}, Limit: 0.1, Unit: "kPa/d", N: 300}
	out := map[string]string{}
	for _, f := range report.Names(report.Events) {
		var b bytes.Buffer
		w, err := report.New(f, report.Events, &b, report.Options{})
		if err != nil {
			t.Fatal(err)
		}
		if err := w.Event(&ev); err != nil {
			t.Fatal(err)
		}
		if err := w.Close(); err != nil {
			t.Fatal(err)
		}
		out[f] = b.String()
	}
	// Half-width (0.146912 − 0.1)/2 = 0.023456: two digits 0.023, so
	// three decimals.
	if tb := out["table"]; !strings.Contains(tb, `qm.\x1b[31mred`) || strings.Contains(tb, "\x1b") ||
		!strings.Contains(tb, "0.123 [0.100, 0.147]") || !strings.Contains(tb, alert.Caution) {
		t.Errorf("table:\n%s", tb)
	}
	recs, err := csv.NewReader(strings.NewReader(out["csv"])).ReadAll()
	if err != nil || len(recs) != 2 || recs[1][2] != ev.Sensor || recs[1][7] != "0.123456" {
		t.Errorf("csv %q (%v): want a header and the event with the id and value as they are", recs, err)
	}
	if !strings.Contains(out["json"], `"value":0.123456`) || strings.Count(out["json"], "\n") != 1 {
		t.Errorf("json %q", out["json"])
	}
}

// TestWriters_TicketOverdue lists three tickets at Now in every text
// format: open and past due (stored flag unset: its sensor stopped
// reporting before its window was judged again), open and not yet due,
// closed after its due date, which is never overdue, and reopened by a
// voided calibration.
func TestWriters_TicketOverdue(t *testing.T) {
	due := time.Date(2026, 11, 20, 0, 0, 0, 0, time.UTC)
	now := due.Add(36 * time.Hour)
	tks := []alert.Ticket{
		{ID: "qm.pt-1@a", Sensor: "qm.pt-1", Due: due},
		{ID: "qm.pt-2@a", Sensor: "qm.pt-2", Due: now.Add(time.Hour)},
		{ID: "qm.pt-3@a", Sensor: "qm.pt-3", Due: due, Calibration: &alert.Calibration{Time: now}},
		{ID: "qm.pt-4@a", Sensor: "qm.pt-4", Due: now.Add(time.Hour), Amendments: []alert.Amendment{{Action: alert.AmendVoided, At: now}}},
	}
	want := []bool{true, false, false, false}
	for _, f := range report.Names(report.Tickets) {
		var b bytes.Buffer
		w, err := report.New(f, report.Tickets, &b, report.Options{Now: now})
		if err != nil {
			t.Fatal(err)
		}
		for i := range tks {
			if err := w.Ticket(&tks[i]); err != nil {
				t.Fatal(err)
			}
		}
		if err := w.Close(); err != nil {
			t.Fatal(err)
		}
		lines := strings.Split(b.String(), "\n")
		for i, tk := range tks {
			var line string
			for _, l := range lines {
				if strings.Contains(l, tk.Sensor) {
					line = l
				}
			}
			var got bool
			switch f {
			case "table":
				got = strings.Contains(line, "open, overdue")
			case "csv":
				got = strings.HasSuffix(strings.TrimSpace(line), ",true")
			case "json":
				got = strings.Contains(line, `"overdue":true`)
			}
			if got != want[i] {
				t.Errorf("%s: %s listed %q, want overdue %v", f, tk.Sensor, line, want[i])
			}
		}
	}
	if tks[0].Overdue {
		t.Error("the listing changed the caller's ticket")
	}
	if got := report.TicketStatus(&tks[3]); got != "open, reopened" {
		t.Errorf("a ticket a voided calibration reopened: status %q, want \"open, reopened\"", got)
	}
}
