package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"math"
	"strings"
	"testing"
	"time"

	"driftfit/cmd/driftfit/internal/report"
	"driftfit/rolling"
)

func runCmd(t *testing.T, stdin string, args ...string) (stdout, stderr string, code int) {
	t.Helper()
	var out, errb bytes.Buffer
	code = run(context.Background(), args, strings.NewReader(stdin), &out, &errb)
	return out.String(), errb.String(), code
}

// TestReplay_JSONMatchesEngine checks that replay prints, for every sensor,
// window and model, exactly the fit the engine gives for the same readings,
// sorted by sensor, window span and model, and that bad rows are reported
// with their line and field while the good rows around them are kept.
func TestReplay_JSONMatchesEngine(t *testing.T) {
	t0 := time.Date(2026, 5, 4, 0, 0, 0, 0, time.UTC)
	var csv strings.Builder
	csv.WriteString("sensor,time,value\n")
	specs := []rolling.WindowSpec{{Span: 7 * 24 * time.Hour, Pane: time.Hour}, {Span: 24 * time.Hour, Pane: time.Hour}}
	want := map[string]*rolling.Sensor{}
	for _, id := range []string{"qm.u2.feed.ft-401", "qm.u1.steam.pt-101"} {
		want[id], _ = rolling.NewSensor(specs...)
	}
	line := 1
	badLines := map[int]string{}
	for i := range 300 {
		for j, id := range []string{"qm.u2.feed.ft-401", "qm.u1.steam.pt-101"} {
			at := t0.Add(time.Duration(i) * 37 * time.Minute)
			v := 100*float64(j+1) + 0.01*float64(i) + math.Sin(float64(i))
			line++
			if i%97 == 5 && j == 0 {
				fmt.Fprintf(&csv, "%s,%s,1e999\n", id, at.Format(time.RFC3339))
				badLines[line] = `value "1e999"`
				continue
			}
			if i%89 == 3 && j == 1 {
				fmt.Fprintf(&csv, "%s,yesterday,%g\n", id, v)
				badLines[line] = `time "yesterday"`
				continue
			}
			fmt.Fprintf(&csv, "%s,%d.%09d,%g\n", id, at.Unix(), at.Nanosecond(), v)
			if err := want[id].Add(rolling.Reading{UnixNano: at.UnixNano(), Value: v}); err != nil {
				t.Fatal(err)
			}
		}
	}
	stdout, stderr, code := runCmd(t, csv.String(), "replay", "--window", "7d,1d", "--pane", "1h", "--format", "json", "-")
	if code != 0 {
		t.Fatalf("exit %d, stderr:\n%s", code, stderr)
	}
	for l, what := range badLines {
		if !strings.Contains(stderr, fmt.Sprintf("line %d: %s", l, what)) {
			t.Errorf("stderr lacks line %d (%s):\n%s", l, what, stderr)
		}
	}
	if !strings.Contains(stderr, fmt.Sprintf("%d bad rows", len(badLines))) {
		t.Errorf("stderr lacks the bad-row count %d:\n%s", len(badLines), stderr)
	}
	var got []report.FitJSON
	sc := bufio.NewScanner(strings.NewReader(stdout))
	for sc.Scan() {
		var rec report.FitJSON
		if err := json.Unmarshal(sc.Bytes(), &rec); err != nil {
			t.Fatalf("bad JSON line %q: %v", sc.Text(), err)
		}
		got = append(got, rec)
	}
	var order []string
	for _, id := range []string{"qm.u1.steam.pt-101", "qm.u2.feed.ft-401"} {
		for _, w := range []struct {
			label string
			idx   int
		}{{"1d", 1}, {"7d", 0}} {
			sol := want[id].Solve(w.idx)
			for _, m := range rolling.Models {
				order = append(order, id+"/"+w.label+"/"+m.String())
				exp := report.NewFitJSON(id, w.label, sol.Fit(m))
				var rec *report.FitJSON
				for i := range got {
					if got[i].Sensor == id && got[i].Window == w.label && got[i].Model == m.String() {
						rec = &got[i]
					}
				}
				if rec == nil {
					t.Fatalf("no output for %s %s %v", id, w.label, m)
				}
				a, _ := json.Marshal(rec)
				b, _ := json.Marshal(exp)
				if !bytes.Equal(a, b) {
					t.Errorf("%s %s %v:\n got %s\nwant %s", id, w.label, m, a, b)
				}
			}
		}
	}
	if len(got) != len(order) {
		t.Fatalf("%d output lines, want %d", len(got), len(order))
	}
	for i, rec := range got {
		if k := rec.Sensor + "/" + rec.Window + "/" + rec.Model; k != order[i] {
			t.Errorf("line %d is %s, want %s", i+1, k, order[i])
		}
	}
}

func TestReplay_Strict(t *testing.T) {
	in := "sensor,time,value\nA,1772366400,1\nA,1772366460,oops\nA,1772366520,3\n"
	_, stderr, code := runCmd(t, in, "replay", "--strict", "-")
	if code != 1 || !strings.Contains(stderr, `line 3: value "oops"`) {
		t.Errorf("exit %d, stderr %q: want exit 1 naming line 3 and the value", code, stderr)
	}
}

func TestReplay_Usage(t *testing.T) {
	cases := []struct {
		args []string
		want string
	}{
		{[]string{"replay"}, "want one input file"},
		{[]string{"replay", "--window", "1d", "-"}, "no pane width"},
		{[]string{"replay", "--window", "90m/1h", "-"}, "whole multiple"},
		{[]string{"replay", "--format", "xml", "-"}, `--format "xml"`},
		// The pane cap: 1h/1ns asked for 3.6e12 panes (a makeslice panic),
		// 1d/10ms for 8.64e6 panes, 1.1 GB a sensor.
		{[]string{"replay", "--window", "1h/1ns", "-"}, `--window "1h/1ns": 3600000000000 panes of 1ns in a span of 1h; at most 100000`},
		{[]string{"replay", "--window", "1d/10ms", "-"}, `8640000 panes of 10ms in a span of 1d; at most 100000`},
	}
	for _, tc := range cases {
		_, stderr, code := runCmd(t, "sensor,time,value\n", tc.args...)
		if code != 2 || !strings.Contains(stderr, tc.want) {
			t.Errorf("%v: exit %d, stderr %q, want exit 2 and %q", tc.args, code, stderr, tc.want)
		}
	}
}
