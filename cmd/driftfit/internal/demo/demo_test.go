package demo_test

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"math"
	"math/rand/v2"
	"strconv"
	"testing"
	"time"

	"github.com/rs/zerolog"

	"driftfit/cmd/driftfit/internal/demo"
	"driftfit/rolling"
)

func TestFleet_Copies(t *testing.T) {
	plant := demo.Plant()
	fleet := demo.Fleet(800)
	if len(plant) != 360 || len(fleet) != 800 {
		t.Fatalf("plant %d, fleet %d; want 360 and 800", len(plant), len(fleet))
	}
	// The 361st sensor is the first copy, under unit qm.x1.
	if fleet[360].ID != "qm.x1."+plant[0].ID[len("qm."):] || fleet[360].Level != plant[0].Level {
		t.Errorf("first copy %+v of %+v", fleet[360], plant[0])
	}
	seen := map[string]bool{}
	for _, s := range fleet {
		if seen[s.ID] {
			t.Fatalf("id %s twice", s.ID)
		}
		seen[s.ID] = true
	}
}

// TestWriteCSV reads the generated file with encoding/csv and checks
// every value against Sensor.Value with the same seed, in the same order.
func TestWriteCSV(t *testing.T) {
	var b bytes.Buffer
	o := demo.CSVOptions{Sensors: 20, Span: 6 * time.Hour, Every: time.Hour, Start: demo.Start, Seed: 3}
	if err := demo.WriteCSV(context.Background(), &b, o); err != nil {
		t.Fatal(err)
	}
	recs, err := csv.NewReader(&b).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if len(recs) != 1+6*20 {
		t.Fatalf("%d records, want a header and 120", len(recs))
	}
	rng := rand.New(rand.NewPCG(3, 0))
	fleet := demo.Fleet(20)
	for i, r := range recs[1:] {
		step, s := i/20, &fleet[i%20]
		want := s.Value(float64(step)/24, rng)
		v, _ := strconv.ParseFloat(r[2], 64)
		if r[0] != s.ID || r[1] != strconv.FormatInt(demo.Start.Add(time.Duration(step)*time.Hour).Unix(), 10) ||
			r[2] != strconv.FormatFloat(want, 'g', 8, 64) || v == 0 {
			t.Fatalf("row %d %q, want %s at step %d value %v", i, r, s.ID, step, want)
		}
	}
}

// TestBoard_LogsRounded: the board's log line carries the drift rounded
// to the two significant digits of its 95% half-width, with the unit.
func TestBoard_LogsRounded(t *testing.T) {
	s, _ := rolling.NewSensor(rolling.WindowSpec{Span: 10 * 24 * time.Hour, Pane: 24 * time.Hour})
	t0 := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	for k := range 48 {
		// 0.12 a day plus ±0.5 alternating noise.
		v := 100 + 0.12*float64(k)/4 + 0.5*float64(1-2*(k%2))
		_ = s.Add(rolling.Reading{UnixNano: t0.Add(time.Duration(k) * 6 * time.Hour).UnixNano(), Value: v})
	}
	sol := s.Solve(0)
	var logs bytes.Buffer
	b := demo.NewBoard(func(string) string { return "kPa" })
	b.PaneClosed("qm.u1.steam.pt-102", 0, &sol)
	ctx, cancel := context.WithTimeout(context.Background(), 80*time.Millisecond)
	defer cancel()
	b.Run(ctx, 20*time.Millisecond, 3, zerolog.New(&logs))
	var line struct {
		Slope     float64 `json:"slope"`
		CI        float64 `json:"slope_ci95"`
		SlopeUnit string  `json:"slope_unit"`
	}
	first, _, _ := bytes.Cut(logs.Bytes(), []byte("\n"))
	if err := json.Unmarshal(first, &line); err != nil {
		t.Fatalf("log %q: %v", logs.String(), err)
	}
	u := sol.Line.TCrit * sol.Line.SE[1]
	// Two significant digits of u (u < 1 here), the slope to the same
	// decimal place: 1 − ⌊log10 u⌋ decimals.
	if u >= 1 {
		t.Fatalf("half-width %v: the check below assumes u < 1", u)
	}
	decimals := 1 - int(math.Floor(math.Log10(u)))
	wantCI, _ := strconv.ParseFloat(strconv.FormatFloat(u, 'f', decimals, 64), 64)
	wantSlope, _ := strconv.ParseFloat(strconv.FormatFloat(sol.Line.Coef[1], 'f', decimals, 64), 64)
	if line.CI != wantCI || line.Slope != wantSlope || line.SlopeUnit != "kPa/d" {
		t.Errorf("log %s: want slope %v ±%v kPa/d (from %v ±%v)", first, wantSlope, wantCI, sol.Line.Coef[1], u)
	} // Run ticks about four times; the line does not change, so it is
	// logged once.
	if n := bytes.Count(logs.Bytes(), []byte("drift standing out")); n != 1 {
		t.Errorf("%d board lines for one unchanged ranking, want 1:\n%s", n, logs.String())
	}
}
