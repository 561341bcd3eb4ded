package web_test

import (
	"bytes"
	"encoding/csv"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"driftfit/cmd/driftfit/internal/web"
	"driftfit/rolling"
	"driftfit/store"
)

// TestSensor_PaneMeansDemo checks the pane means of the demo sensors'
// windows against the readings fed into each pane, computed here (see
// checkPaneMeans): a line, a parabola (the thermocouple, on its lead
// time), a sensor whose fits restarted at a calibration, and one with
// no rule.
func TestSensor_PaneMeansDemo(t *testing.T) {
	db := openDB(t)
	fed := fillDemo(t, db)
	srv := newServer(t, web.Options{DB: db, Rule: ruleFunc(demoRules()), Now: func() time.Time { return demoEnd }})
	for _, id := range []string{idGD, idTC, idPT, idFM} {
		v := getJSON[sensorPanesJSON](t, srv, "/api/sensors/"+id)
		if len(v.Windows) != len(demoWindows) {
			t.Fatalf("%s: %d windows", id, len(v.Windows))
		}
		for i, w := range v.Windows {
			if id == idTC && w.Fit.Model != "parabola" {
				t.Errorf("%s: model %s, want parabola", id, w.Fit.Model)
			}
			checkPaneMeans(t, id, w, demoWindows[i], demoWindows, fed[id])
			if len(w.Panes) == 0 {
				t.Errorf("%s %s: no pane means", id, w.Window)
			}
		}
	}
}

// TestSensor_PaneMeansAsOf checks what the page shows of the readings as
// of an earlier time: only the panes the current windows still keep
// whose readings all came at or before it, and a note on those of the
// fit that are gone; none at all when the fit's panes are all gone.
func TestSensor_PaneMeansAsOf(t *testing.T) {
	_, srv := demoServer(t)
	now := getJSON[sensorPanesJSON](t, srv, "/api/sensors/"+idGD)
	for _, tc := range []struct {
		name      string
		back      time.Duration
		wantPanes []bool   // per window: some pane means shown
		wantNote  []string // per window, in the note
	}{
		{"a week back", 7 * 24 * time.Hour, []bool{false, true},
			[]string{"none of this fit's panes is kept any more", "this fit's panes before 17 Nov 2026 00:00 UTC are gone"}},
		{"three weeks back", 21 * 24 * time.Hour, []bool{false, false},
			[]string{"none of this fit's panes is kept any more", "none of this fit's panes is kept any more"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			asof := demoEnd.Add(-tc.back)
			q := "?asof=" + asof.Format(time.RFC3339)
			v := getJSON[sensorPanesJSON](t, srv, "/api/sensors/"+idGD+q)
			for i, w := range v.Windows {
				if (len(w.Panes) > 0) != tc.wantPanes[i] || !strings.Contains(w.Note, tc.wantNote[i]) ||
					!strings.HasPrefix(w.Note, "readings are kept for the current window only") {
					t.Errorf("%s: %d pane means, note %q; want some %v, note with %q", w.Window, len(w.Panes), w.Note, tc.wantPanes[i], tc.wantNote[i])
				}
				for _, p := range w.Panes {
					if p.T.After(asof) || p.Start.After(asof) {
						t.Errorf("%s: pane %v–%v shown as of %v", w.Window, p.Start, p.End, asof)
					}
					// The same pane now: the same readings.
					for _, q := range now.Windows[i].Panes {
						if q.Start.Equal(p.Start) && (q.N != p.N || q.Mean != p.Mean) {
							t.Errorf("%s: pane %v as of %v holds %d readings, mean %v; now %d, %v", w.Window, p.Start, asof, p.N, p.Mean, q.N, q.Mean)
						}
					}
				}
			}
			st, body := get(t, srv, "/sensors/"+idGD+q)
			if st != 200 || !strings.Contains(body, "No pane means: readings are kept for the current window only") {
				t.Errorf("page as of %v: %d, without the message that the panes are gone", asof, st)
			}
		})
	}
}

// TestSensor_CSVPanes checks the pane rows of the CSV export against the
// JSON.
func TestSensor_CSVPanes(t *testing.T) {
	_, srv := demoServer(t)
	v := getJSON[sensorPanesJSON](t, srv, "/api/sensors/"+idTC)
	_, body := get(t, srv, "/sensors/"+idTC+".csv")
	recs, err := csv.NewReader(strings.NewReader(body)).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	col := map[string]int{}
	for i, h := range recs[0] {
		col[h] = i
	}
	byWindow := map[string][][]string{}
	for _, r := range recs[1:] {
		if r[0] == "pane" {
			byWindow[r[col["window"]]] = append(byWindow[r[col["window"]]], r)
		}
	}
	for _, w := range v.Windows {
		rows := byWindow[w.Window]
		if len(rows) != len(w.Panes) || len(rows) == 0 {
			t.Fatalf("%s: %d pane rows, JSON %d panes", w.Window, len(rows), len(w.Panes))
		}
		for i, r := range rows {
			p := w.Panes[i]
			mean, _ := strconv.ParseFloat(r[col["mean"]], 64)
			resid, _ := strconv.ParseFloat(r[col["residual"]], 64)
			start, _ := time.Parse(time.RFC3339Nano, r[col["pane_start"]])
			if mean != p.Mean || p.Resid == nil || resid != *p.Resid || !start.Equal(p.Start) || r[col["n"]] != strconv.Itoa(p.N) ||
				r[col["status"]] != map[bool]string{true: "in_fit", false: "not_in_fit"}[p.InFit] {
				t.Errorf("%s pane %d: CSV %v, JSON %+v", w.Window, i, r, p)
			}
		}
	}
}

// TestSensor_DamagedPanes damages the stored panes of one sensor on
// disk: its page still shows its fits and verdicts, says its readings
// could not be read and why, and every other sensor's pane means are
// untouched.
func TestSensor_DamagedPanes(t *testing.T) {
	path := filepath.Join(t.TempDir(), "driftfit.db")
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	fillDemo(t, db)
	s, ok, err := db.LoadSensor(idGD)
	if err != nil || !ok {
		t.Fatalf("LoadSensor: %v, %v", ok, err)
	}
	// The newest daily pane's bytes, as the file holds them (a pane is
	// stored as rolling.AppendPane writes it).
	newest, _ := s.Newest(1)
	pane := s.AppendPane(nil, rolling.PaneKey{Width: 24 * time.Hour, Index: newest.UnixNano() / int64(24*time.Hour)})
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	n := 0
	for i := bytes.Index(raw, pane); i >= 0 && len(pane) > 0; {
		raw[i+31] ^= 0x80 // the sign of y0, the pane's first value
		n++
		j := bytes.Index(raw[i+1:], pane)
		if j < 0 {
			break
		}
		i += 1 + j
	}
	if n == 0 {
		t.Fatal("pane not found in the file")
	}
	if err := os.WriteFile(path, raw, 0o600); err != nil {
		t.Fatal(err)
	}
	db, err = store.Open(path, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { db.Close() })
	srv := newServer(t, web.Options{DB: db, Rule: ruleFunc(demoRules()), Now: func() time.Time { return demoEnd }})
	v := getJSON[sensorPanesJSON](t, srv, "/api/sensors/"+idGD)
	if len(v.Windows) != len(demoWindows) || v.State != "judged" {
		t.Fatalf("%s: %d windows, state %s; want its fits and verdicts as before", idGD, len(v.Windows), v.State)
	}
	for _, w := range v.Windows {
		if len(w.Panes) != 0 || !strings.Contains(w.Note, "the stored readings could not be read") ||
			!strings.Contains(w.Note, idGD) || !strings.Contains(w.Note, "checksum") {
			t.Errorf("%s: %d pane means, note %q; want none, and the error naming the sensor", w.Window, len(w.Panes), w.Note)
		}
	}
	if st, body := get(t, srv, "/sensors/"+idGD); st != 200 || !strings.Contains(body, "the stored readings could not be read") {
		t.Errorf("page: %d, without the reason the panes are missing", st)
	}
	for _, id := range []string{idTC, idPT} {
		if v := getJSON[sensorPanesJSON](t, srv, "/api/sensors/"+id); len(v.Windows[1].Panes) == 0 || strings.Contains(v.Windows[1].Note, "could not be read") {
			t.Errorf("%s: pane means lost with another sensor's damage: %+v", id, v.Windows[1])
		}
	}
}
