package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"encoding/xml"
	"errors"
	"flag"
	"fmt"
	"image/png"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"driftfit/cmd/driftfit/internal/demo"
	"driftfit/cmd/driftfit/internal/query"
	"driftfit/cmd/driftfit/internal/report"
	"driftfit/rolling"
	"driftfit/store"
)

// plotOut, when set, receives a copy of the test plots for a person to
// look at: go test ./cmd/driftfit -run Plot -args -plot-out /tmp
var plotOut = flag.String("plot-out", "", "directory to copy the history test plots into")

// histWindows are the fixture's windows with their labels written out
// by hand (not by the code under test). Two share the span 7d so that
// --window 7d selects both.
var histWindows = []struct {
	spec  rolling.WindowSpec
	label string
}{
	{rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour}, "1d/1h"},
	{rolling.WindowSpec{Span: 7 * 24 * time.Hour, Pane: 24 * time.Hour}, "7d/1d"},
	{rolling.WindowSpec{Span: 7 * 24 * time.Hour, Pane: 6 * time.Hour}, "7d/6h"},
}

func histLabel(ws rolling.WindowSpec) string {
	for _, w := range histWindows {
		if w.spec == ws {
			return w.label
		}
	}
	panic(fmt.Sprintf("window %v not in the fixture", ws))
}

// histRecord is one fit record the fixture wrote, with the count of the
// sensor's readings fed before it (the reading at that index closed the
// pane).
type histRecord struct {
	sol    rolling.Solution
	before int
}

type histFixture struct {
	path     string
	readings map[string][]rolling.Reading
	// records per sensor in the order the store returns them: by time,
	// then window span, then pane width.
	records map[string][]histRecord
}

// Two sensors of the demo plant: a pressure drifting 0.12 kPa/day and a
// temperature whose drift accelerates (plant.go).
const (
	histDrifting     = "qm.u1.steam.pt-102"
	histAccelerating = "qm.u2.reactor.tt-204"
)

// newHistFixture writes 21 days of readings every 20 minutes of two
// demo sensors through the fits into a bbolt file, recording each
// window's fit when its newest pane closes and committing in batches,
// as the service does. Seeded noise, seed printed.
func newHistFixture(t *testing.T) *histFixture {
	t.Helper()
	const seed = 20260505
	t.Logf("fixture seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	f := &histFixture{
		path:     filepath.Join(t.TempDir(), "driftfit.db"),
		readings: map[string][]rolling.Reading{},
		records:  map[string][]histRecord{},
	}
	db, err := store.Open(f.path, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	var specs []rolling.WindowSpec
	for _, w := range histWindows {
		specs = append(specs, w.spec)
	}
	plant := map[string]demo.Sensor{}
	for _, s := range demo.Plant() {
		plant[s.ID] = s
	}
	ids := []string{histDrifting, histAccelerating}
	sensors := map[string]*rolling.Sensor{}
	for _, id := range ids {
		if sensors[id], err = rolling.NewSensor(specs...); err != nil {
			t.Fatal(err)
		}
	}
	t0 := time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC)
	var b store.Batch
	const step = 20 * time.Minute
	for k := range 21 * 24 * 3 {
		at := t0.Add(time.Duration(k) * step)
		for _, id := range ids {
			ds := plant[id]
			rd := rolling.Reading{UnixNano: at.UnixNano(), Value: ds.Value(at.Sub(t0).Hours()/24, rng)}
			s := sensors[id]
			mask := s.Closes(rd.UnixNano)
			for w := range s.Windows() {
				if mask&(1<<w) == 0 {
					continue
				}
				sol := s.Solve(w)
				if err := b.Record(id, &sol); err != nil {
					t.Fatal(err)
				}
				f.records[id] = append(f.records[id], histRecord{sol: sol, before: len(f.readings[id])})
			}
			if err := s.Add(rd); err != nil {
				t.Fatal(err)
			}
			f.readings[id] = append(f.readings[id], rd)
		}
		if k%100 == 99 {
			for _, id := range ids {
				if err := b.Sensor(id, sensors[id]); err != nil {
					t.Fatal(err)
				}
			}
			if _, err := db.Commit(&b); err != nil {
				t.Fatal(err)
			}
		}
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	if err := db.Check(); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	for _, id := range ids {
		slices.SortStableFunc(f.records[id], func(a, b histRecord) int {
			if c := a.sol.Last.Compare(b.sol.Last); c != 0 {
				return c
			}
			if a.sol.Window.Span != b.sol.Window.Span {
				return int(a.sol.Window.Span - b.sol.Window.Span)
			}
			return int(a.sol.Window.Pane - b.sol.Window.Pane)
		})
	}
	return f
}

// wantJSON is the JSON line replay would print for one fit: the shared
// fitJSON form with the window label as typed.
func wantJSON(t *testing.T, id string, sol *rolling.Solution, m rolling.Model) string {
	t.Helper()
	b, err := json.Marshal(report.NewFitJSON(id, histLabel(sol.Window), sol.Fit(m)))
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

func lines(s string) []string {
	var out []string
	sc := bufio.NewScanner(strings.NewReader(s))
	sc.Buffer(nil, 1<<20)
	for sc.Scan() {
		out = append(out, sc.Text())
	}
	return out
}

func TestHistory_JSONEqualsStoredFits(t *testing.T) {
	f := newHistFixture(t)
	for _, id := range []string{histDrifting, histAccelerating} {
		stdout, stderr, code := runCmd(t, "", "history", id, "--db", f.path, "--format", "json")
		if code != 0 {
			t.Fatalf("history %s: exit %d, stderr:\n%s", id, code, stderr)
		}
		got := lines(stdout)
		recs := f.records[id]
		if len(got) != 3*len(recs) {
			t.Fatalf("history %s: %d lines, want %d records × 3 models", id, len(got), 3*len(recs))
		}
		for i, r := range recs {
			for j, m := range rolling.Models {
				if want := wantJSON(t, id, &r.sol, m); got[3*i+j] != want {
					t.Fatalf("history %s line %d:\n got %s\nwant %s", id, 3*i+j+1, got[3*i+j], want)
				}
			}
		}
	}
}

// TestHistory_EqualsReplay checks history against replay, command
// against command: a stored record is the fit of the readings before the
// one that closed the pane, so replay of exactly those readings must
// print the same JSON line.
func TestHistory_EqualsReplay(t *testing.T) {
	f := newHistFixture(t)
	id := histDrifting
	recs := f.records[id]
	// The last record of each window, and one from the middle.
	picks := map[string]histRecord{}
	for _, r := range recs {
		picks[histLabel(r.sol.Window)] = r
	}
	picks["middle"] = recs[len(recs)/2]
	for name, r := range picks {
		t.Run(name, func(t *testing.T) {
			label := histLabel(r.sol.Window)
			var in strings.Builder
			in.WriteString("sensor,time,value\n")
			for _, rd := range f.readings[id][:r.before] {
				fmt.Fprintf(&in, "%s,%d.%09d,%s\n", id, rd.UnixNano/1e9, rd.UnixNano%1e9, strconv.FormatFloat(rd.Value, 'g', -1, 64))
			}
			rep, stderr, code := runCmd(t, in.String(), "replay", "--window", "1d/1h,7d/1d,7d/6h", "--format", "json", "-")
			if code != 0 {
				t.Fatalf("replay: exit %d, stderr:\n%s", code, stderr)
			}
			at := r.sol.Last.UTC().Format(time.RFC3339Nano)
			hist, stderr, code := runCmd(t, "", "history", id, "--db", f.path, "--format", "json", "--window", label, "--since", at)
			if code != 0 {
				t.Fatalf("history: exit %d, stderr:\n%s", code, stderr)
			}
			h := lines(hist)
			if len(h) < 3 {
				t.Fatalf("history since %s printed %d lines", at, len(h))
			}
			var fromReplay []string
			for _, l := range lines(rep) {
				if strings.Contains(l, `"window":"`+label+`"`) {
					fromReplay = append(fromReplay, l)
				}
			}
			if !slices.Equal(h[:3], fromReplay) {
				t.Errorf("window %s at %s:\nhistory %q\n replay %q", label, at, h[:3], fromReplay)
			}
		})
	}
}

func TestHistory_Table(t *testing.T) {
	f := newHistFixture(t)
	for _, tc := range []struct {
		name string
		args []string
		unit string // of the rate column
	}{
		{"no unit known", nil, "/d"},
		// configs/demo.yaml gives the pressure class the unit kPa.
		{"unit from the config", []string{"--config", "../../configs/demo.yaml"}, "kPa/d"},
		{"unit from the flag", []string{"--unit", "bar"}, "bar/d"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			args := append([]string{"history", histDrifting, "--db", f.path, "--window", "7d/1d", "--model", "line"}, tc.args...)
			stdout, stderr, code := runCmd(t, "", args...)
			if code != 0 {
				t.Fatalf("exit %d, stderr:\n%s", code, stderr)
			}
			rows := lines(stdout)
			var want []histRecord
			for _, r := range f.records[histDrifting] {
				if r.sol.Window.Pane == 24*time.Hour {
					want = append(want, r)
				}
			}
			if len(rows) != len(want)+1 {
				t.Fatalf("%d rows, want a header and %d records:\n%s", len(rows), len(want), stdout)
			}
			if !strings.HasPrefix(rows[0], "SENSOR") || !strings.Contains(rows[0], "RATE ±95%") {
				t.Errorf("header %q", rows[0])
			}
			for i, r := range want {
				row := rows[i+1]
				fit := &r.sol.Line
				fields := []string{histDrifting, "7d/1d", "line", r.sol.Last.UTC().Format("2006-01-02 15:04:05")}
				if fit.OK() {
					// GUM (JCGM 100:2008) 7.2.6: the 95% half-width u to two
					// significant digits, the rate to the same decimal place.
					v, u := fit.Coef[1], fit.TCrit*fit.SE[1]
					place := int(math.Floor(math.Log10(u))) - 1
					if place >= 0 {
						t.Fatalf("record %d: half-width %v ≥ 10, outside what this check writes out", i, u)
					}
					fields = append(fields, fmt.Sprintf("%.*f ±%.2g %s", -place, v, u, tc.unit))
				}
				for _, s := range fields {
					if !strings.Contains(row, s) {
						t.Errorf("row %d %q lacks %q", i+1, row, s)
					}
				}
			}
		})
	}
}

func TestHistory_CSV(t *testing.T) {
	f := newHistFixture(t)
	stdout, stderr, code := runCmd(t, "", "history", histAccelerating, "--db", f.path, "--format", "csv", "--window", "1d/1h")
	if code != 0 {
		t.Fatalf("exit %d, stderr:\n%s", code, stderr)
	}
	// RFC 4180 section 2, rule 1: every record ends with CRLF.
	if strings.Count(stdout, "\r\n") != strings.Count(stdout, "\n") {
		t.Errorf("line ends are not all CRLF")
	}
	// encoding/csv is the independent reader of RFC 4180.
	recs, err := csv.NewReader(strings.NewReader(stdout)).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	header := []string{"time", "sensor", "window", "model", "status", "n", "excluded", "first",
		"c0", "c0_se", "c0_ci95_low", "c0_ci95_high",
		"c1_per_day", "c1_se_per_day", "c1_ci95_low_per_day", "c1_ci95_high_per_day",
		"c2_per_day2", "c2_se_per_day2", "c2_ci95_low_per_day2", "c2_ci95_high_per_day2",
		"resid_sd", "r2", "df", "cond", "pos_def", "doubling_days"}
	if !slices.Equal(recs[0], header) {
		t.Fatalf("header %q\nwant %q", recs[0], header)
	}
	col := map[string]int{}
	for i, h := range header {
		col[h] = i
	}
	var want []histRecord
	for _, r := range f.records[histAccelerating] {
		if r.sol.Window.Pane == time.Hour {
			want = append(want, r)
		}
	}
	if len(recs) != 1+3*len(want) {
		t.Fatalf("%d CSV records, want 1 + 3 × %d", len(recs), len(want))
	}
	num := func(row []string, name string) float64 {
		t.Helper()
		v, err := strconv.ParseFloat(row[col[name]], 64)
		if err != nil {
			t.Fatalf("column %s: %v", name, err)
		}
		return v
	}
	notOK := 0
	for i, r := range want {
		for j, m := range rolling.Models {
			row := recs[1+3*i+j]
			fit := r.sol.Fit(m)
			what := fmt.Sprintf("row %d (%s %v)", 1+3*i+j, row[0], m)
			if row[col["time"]] != r.sol.Last.UTC().Format(time.RFC3339Nano) || row[col["model"]] != m.String() || row[col["window"]] != "1d/1h" {
				t.Fatalf("%s: time/model/window %q %q %q", what, row[0], row[col["model"]], row[col["window"]])
			}
			if n, _ := strconv.Atoi(row[col["n"]]); n != fit.N {
				t.Errorf("%s: n = %s, want %d", what, row[col["n"]], fit.N)
			}
			if !fit.OK() {
				notOK++
				for _, c := range []string{"c0", "c1_per_day", "resid_sd", "r2"} {
					if row[col[c]] != "" {
						t.Errorf("%s: failed fit (%v) has %s = %q", what, fit.Err, c, row[col[c]])
					}
				}
				continue
			}
			// Shortest round-trip formatting: the value read back is the
			// same float64, bit for bit (strconv.FormatFloat, precision -1).
			for _, c := range []struct {
				name string
				want float64
			}{
				{"c0", fit.Coef[0]}, {"c1_per_day", fit.Coef[1]}, {"c1_se_per_day", fit.SE[1]},
				{"c1_ci95_low_per_day", fit.CI[1][0]}, {"c1_ci95_high_per_day", fit.CI[1][1]}, {"resid_sd", fit.ResidSD},
			} {
				if got := num(row, c.name); math.Float64bits(got) != math.Float64bits(c.want) {
					t.Errorf("%s: %s = %v, want %v", what, c.name, got, c.want)
				}
			}
			if m == rolling.Parabola {
				if got := num(row, "c2_per_day2"); math.Float64bits(got) != math.Float64bits(fit.Coef[2]) {
					t.Errorf("%s: c2_per_day2 = %v, want %v", what, got, fit.Coef[2])
				}
			} else if row[col["c2_per_day2"]] != "" {
				t.Errorf("%s: c2_per_day2 = %q for a two-coefficient model", what, row[col["c2_per_day2"]])
			}
			if (m == rolling.Exp) != (row[col["doubling_days"]] != "") {
				t.Errorf("%s: doubling_days = %q", what, row[col["doubling_days"]])
			}
		}
	}
	if notOK == 0 {
		t.Error("the fixture should include failed fits (the first hours of the 1d window)")
	}
}

// timesOf returns the window and time of each record in history's JSON
// output, one per record (the line model's line).
func timesOf(t *testing.T, out string) []string {
	t.Helper()
	var got []string
	for _, l := range lines(out) {
		var rec report.FitJSON
		if err := json.Unmarshal([]byte(l), &rec); err != nil {
			t.Fatalf("bad JSON line %q: %v", l, err)
		}
		if rec.Model == "line" {
			got = append(got, rec.Window+" "+rec.Last)
		}
	}
	return got
}

func TestHistory_Filters(t *testing.T) {
	f := newHistFixture(t)
	recs := f.records[histDrifting]
	mid, late := recs[len(recs)/3].sol.Last, recs[2*len(recs)/3].sol.Last
	// now sits four days after the newest record, so --since 5d starts
	// one day before it.
	newest := recs[len(recs)-1].sol.Last
	now := newest.Add(4 * 24 * time.Hour)
	rfc := func(t time.Time) string { return t.UTC().Format(time.RFC3339Nano) }
	cases := []struct {
		name  string
		args  []string
		match func(r histRecord) bool
	}{
		{"all", nil, func(histRecord) bool { return true }},
		{"span only", []string{"--window", "7d"}, func(r histRecord) bool { return r.sol.Window.Span == 7*24*time.Hour }},
		{"span and pane", []string{"--window", "7d/6h"}, func(r histRecord) bool { return r.sol.Window.Pane == 6*time.Hour }},
		{"one week in hours", []string{"--window", "168h/6h"}, func(r histRecord) bool { return r.sol.Window.Pane == 6*time.Hour }},
		{"since inclusive", []string{"--since", rfc(mid)}, func(r histRecord) bool { return !r.sol.Last.Before(mid) }},
		{"until exclusive", []string{"--until", rfc(late)}, func(r histRecord) bool { return r.sol.Last.Before(late) }},
		{"window since until", []string{"--window", "1d/1h", "--since", rfc(mid), "--until", rfc(late)}, func(r histRecord) bool {
			return r.sol.Window.Pane == time.Hour && !r.sol.Last.Before(mid) && r.sol.Last.Before(late)
		}},
		{"relative since", []string{"--since", "5d"}, func(r histRecord) bool { return !r.sol.Last.Before(now.Add(-5 * 24 * time.Hour)) }},
		{"date since", []string{"--since", "2026-03-15"}, func(r histRecord) bool {
			return !r.sol.Last.Before(time.Date(2026, 3, 15, 0, 0, 0, 0, time.UTC))
		}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			var want []string
			for _, r := range recs {
				if tc.match(r) {
					want = append(want, histLabel(r.sol.Window)+" "+rfc(r.sol.Last))
				}
			}
			if len(want) == 0 || len(want) == len(recs) && tc.name != "all" {
				t.Fatalf("case selects %d of %d records: not a test of filtering", len(want), len(recs))
			}
			var out, errb bytes.Buffer
			args := append([]string{histDrifting, "--db", f.path, "--format", "json"}, tc.args...)
			if err := history(context.Background(), now, args, &out, &errb); err != nil {
				t.Fatalf("history %v: %v", tc.args, err)
			}
			if got := timesOf(t, out.String()); !slices.Equal(got, want) {
				t.Errorf("history %v: %d records, want %d\nfirst got %q\nfirst want %q", tc.args, len(got), len(want), got[:min(3, len(got))], want[:min(3, len(want))])
			}
		})
	}
}

func TestHistory_Errors(t *testing.T) {
	f := newHistFixture(t)
	missingDB := filepath.Join(t.TempDir(), "none.db")
	cases := []struct {
		name   string
		args   []string
		code   int
		stderr []string
	}{
		{"unknown sensor", []string{"qm.u1.steam.pt-1o2", "--db", f.path}, 1,
			[]string{`sensor "qm.u1.steam.pt-1o2" has no fit history`, "2 sensors have history", histDrifting}},
		{"no database", []string{histDrifting, "--db", missingDB}, 1, []string{"no database file at " + missingDB}},
		{"window without records", []string{histDrifting, "--db", f.path, "--window", "30d"}, 0,
			[]string{"no records of " + histDrifting + " match", "windows 1d/1h, 7d/6h, 7d/1d from 2026-03-02T"}},
		{"nothing to plot", []string{histDrifting, "--db", f.path, "--window", "2d/1h", "--plot", filepath.Join(t.TempDir(), "x.png")}, 1,
			[]string{"nothing to plot"}},
		{"no sensor", []string{"--db", f.path}, 2, []string{"want one SENSOR id"}},
		{"two sensors", []string{histDrifting, histAccelerating}, 2, []string{"got 2 arguments"}},
		{"bad window", []string{histDrifting, "--window", "90m/1h"}, 2, []string{`--window "90m/1h"`, "whole multiple"}},
		{"bad span", []string{histDrifting, "--window", "week"}, 2, []string{`--window "week"`}},
		{"bad since", []string{histDrifting, "--since", "yesterday"}, 2, []string{`--since "yesterday"`, "RFC 3339"}},
		{"negative since", []string{histDrifting, "--since", "-3d"}, 2, []string{`--since "-3d"`, "positive"}},
		{"since after until", []string{histDrifting, "--since", "2026-03-10", "--until", "2026-03-09"}, 2, []string{"is not before --until"}},
		{"bad format", []string{histDrifting, "--format", "xml"}, 2, []string{`--format "xml"`}},
		{"bad model", []string{histDrifting, "--model", "line,cubic"}, 2, []string{`"cubic" is not a model`}},
		{"bad plot name", []string{histDrifting, "--plot", "out.pdf"}, 2, []string{`--plot "out.pdf"`, ".png or .svg"}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			stdout, stderr, code := runCmd(t, "", append([]string{"history"}, tc.args...)...)
			if stdout != "" {
				t.Errorf("printed on stdout:\n%s", stdout)
			}
			if code != tc.code {
				t.Errorf("exit %d, want %d; stderr:\n%s", code, tc.code, stderr)
			}
			for _, s := range tc.stderr {
				if !strings.Contains(stderr, s) {
					t.Errorf("stderr lacks %q:\n%s", s, stderr)
				}
			}
		})
	}
}

// TestHistory_DataDir finds the file by the service's data directory,
// as serve names it, and by --db; --db wins.
func TestHistory_DataDir(t *testing.T) {
	f := newHistFixture(t)
	want, _, code := runCmd(t, "", "history", histDrifting, "--db", f.path, "--format", "json")
	if code != 0 || want == "" {
		t.Fatalf("history --db: exit %d", code)
	}
	for _, args := range [][]string{
		{"--data", filepath.Dir(f.path)},
		{"--data", t.TempDir(), "--db", f.path},
	} {
		got, stderr, code := runCmd(t, "", append([]string{"history", histDrifting, "--format", "json"}, args...)...)
		if code != 0 || got != want {
			t.Errorf("history %v: exit %d, %d bytes (want %d); stderr:\n%s", args, code, len(got), len(want), stderr)
		}
	}
}

// TestHistory_FileInUse holds the file open for writing, as a running
// service does: bbolt's writer holds an exclusive flock, the read-only
// open a shared one, and flock locks belong to the open file description,
// so the two conflict even inside one process (flock(2)).
func TestHistory_FileInUse(t *testing.T) {
	f := newHistFixture(t)
	w, err := store.Open(f.path, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { w.Close() })
	var out, errb bytes.Buffer
	start := time.Now()
	err = history(context.Background(), time.Now(), []string{histDrifting, "--db", f.path}, &out, &errb)
	if !errors.Is(err, store.ErrLocked) || !strings.Contains(err.Error(), "in use by a running driftfit serve") {
		t.Fatalf("history while the file is open for writing: %v, want ErrLocked naming driftfit serve", err)
	}
	if d := time.Since(start); d > 10*query.LockWait {
		t.Errorf("took %v to give up, lock wait is %v", d, query.LockWait)
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	// Two readers share the file.
	r, err := store.Open(f.path, store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	if _, stderr, code := runCmd(t, "", "history", histDrifting, "--db", f.path); code != 0 {
		t.Fatalf("history beside another reader: exit %d, stderr:\n%s", code, stderr)
	}
}

func TestHistory_Plot(t *testing.T) {
	f := newHistFixture(t)
	dir := t.TempDir()
	cases := []struct {
		name, file string
		args       []string
		cols       int
	}{
		{"one window", "drift-7d.png", []string{histDrifting, "--window", "7d/1d", "--unit", "kPa"}, 1},
		{"three windows", "accel-all.png", []string{histAccelerating}, 3},
		// The unit comes from the demo plant's config (configs/demo.yaml).
		{"svg", "drift-1d.svg", []string{histDrifting, "--window", "1d/1h", "--config", "../../configs/demo.yaml"}, 1},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			path := filepath.Join(dir, tc.file)
			args := append([]string{"history", "--db", f.path, "--plot", path}, tc.args...)
			stdout, stderr, code := runCmd(t, "", args...)
			if code != 0 {
				t.Fatalf("exit %d, stderr:\n%s", code, stderr)
			}
			if stdout != "" {
				t.Errorf("--plot without --format printed %d bytes on stdout", len(stdout))
			}
			data, err := os.ReadFile(path)
			if err != nil {
				t.Fatal(err)
			}
			if *plotOut != "" {
				if err := os.WriteFile(filepath.Join(*plotOut, tc.file), data, 0o644); err != nil {
					t.Fatal(err)
				}
			}
			if strings.HasSuffix(tc.file, ".svg") {
				checkSVG(t, data, tc.args[0])
				for _, label := range []string{"level (kPa)", "drift rate (kPa/day)", "window 1d/1h"} {
					if !bytes.Contains(data, []byte(label)) {
						t.Errorf("SVG lacks the label %q", label)
					}
				}
				return
			}
			img, err := png.Decode(bytes.NewReader(data))
			if err != nil {
				t.Fatalf("decode PNG: %v", err)
			}
			// 10 in for the first window, 7 in for each further one; with
			// the level and drift panels at least 7.825 in high (0.75
			// header, 2.8 level, 1.9 drift, two gaps of 0.125, 1.25 marker
			// strip, a legend of at least three 15-point rows and 0.25 in
			// of margin), at 120 dots per inch.
			wantW, minH := (10+7*(tc.cols-1))*120, 939
			if b := img.Bounds(); b.Dx() != wantW || b.Dy() < minH {
				t.Errorf("PNG is %d×%d, want %d wide and at least %d high", b.Dx(), b.Dy(), wantW, minH)
			}
			// The bands and curves are there: count pixels of the band and
			// curve colours.
			counts := map[[3]uint32]int{}
			b := img.Bounds()
			for y := b.Min.Y; y < b.Max.Y; y++ {
				for x := b.Min.X; x < b.Max.X; x++ {
					r, g, bl, _ := img.At(x, y).RGBA()
					counts[[3]uint32{r >> 8, g >> 8, bl >> 8}]++
				}
			}
			for name, c := range map[string][3]uint32{
				// Okabe–Ito blue #0072B2, and 30% of it on white.
				"curve": {0x00, 0x72, 0xb2}, "band": {0xb3, 0xd5, 0xe8},
			} {
				// At least a line's worth of pixels per column.
				if counts[c] < 300*tc.cols {
					t.Errorf("%d pixels of the %s colour, want a visible band or curve", counts[c], name)
				}
			}
		})
	}
}

// checkSVG parses an SVG with encoding/xml (well-formed XML, root <svg>)
// and looks for the title.
func checkSVG(t *testing.T, data []byte, sensor string) {
	t.Helper()
	if len(data) < 10000 {
		t.Errorf("SVG of %d bytes is too small for two panels", len(data))
	}
	dec := xml.NewDecoder(bytes.NewReader(data))
	root, elems := "", 0
	for {
		tok, err := dec.Token()
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatalf("SVG is not well-formed XML: %v", err)
		}
		if se, ok := tok.(xml.StartElement); ok {
			if root == "" {
				root = se.Name.Local
			}
			elems++
		}
	}
	if root != "svg" || elems < 50 {
		t.Errorf("SVG root <%s> with %d elements", root, elems)
	}
	if !bytes.Contains(data, []byte(sensor)) {
		t.Errorf("SVG lacks the sensor id %s in its title", sensor)
	}
}
