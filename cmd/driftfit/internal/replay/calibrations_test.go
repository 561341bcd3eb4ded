package replay_test

import (
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
	"testing"
	"time"

	"driftfit/cmd/driftfit/internal/replay"
	"driftfit/ingest"
)

func TestReadCalibrations(t *testing.T) {
	// 1772366400 is 2026-03-01T00:00:00Z (date -u -d @1772366400).
	const good = "\uFEFFnote,as_left,time,sensor,as_found\n" +
		"x,500,2026-03-02T00:00:00Z,qm.u1.steam.pt-101,502.5\n" +
		"y,-1.5e-3,1772366400.25,qm.u2.feed.tt-201,0\n"
	cals, bad, err := replay.ReadCalibrations(strings.NewReader(good))
	if err != nil || len(bad) != 0 {
		t.Fatalf("ReadCalibrations(good) = %v, %v", bad, err)
	}
	want := []struct {
		line          int
		sensor        string
		at            time.Time
		found, asLeft float64
	}{
		{3, "qm.u2.feed.tt-201", time.Unix(1772366400, 250000000).UTC(), 0, -1.5e-3}, // earlier: sorted first
		{2, "qm.u1.steam.pt-101", time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC), 502.5, 500},
	}
	if len(cals) != len(want) {
		t.Fatalf("ReadCalibrations(good) = %d calibrations, want %d", len(cals), len(want))
	}
	for i, w := range want {
		c := cals[i]
		if c.Line != w.line || c.Sensor != w.sensor || !c.Time.Equal(w.at) || c.AsFound != w.found || c.AsLeft != w.asLeft {
			t.Errorf("calibration %d = %+v, want line %d %s at %v as-found %v as-left %v", i, c, w.line, w.sensor, w.at, w.found, w.asLeft)
		}
	}

	rows := []struct {
		name, row, want string
	}{
		{"bad time", "a,soon,1,2", `calibrations line 2: time "soon"`},
		{"not a number", "a,1772366400,one,2", `calibrations line 2: as_found "one": not a number`},
		{"infinite", "a,1772366400,1,Inf", `calibrations line 2: as_left "Inf": not finite`},
		{"NaN", "a,1772366400,NaN,1", `calibrations line 2: as_found "NaN": not finite`},
		{"empty sensor", ",1772366400,1,2", `calibrations line 2: sensor "": ingest: invalid sensor id: empty`},
		{"wildcard sensor", "qm.u1.*,1772366400,1,2", `calibrations line 2: sensor "qm.u1.*": ingest: invalid sensor id: wildcard '*' at byte 6`},
		{"space in sensor", "qm.u1 pt-101,1772366400,1,2", `sensor "qm.u1 pt-101": ingest: invalid sensor id: character U+0020 at byte 5 is not printable`},
		{"doubled dot", "qm..pt-101,1772366400,1,2", `sensor "qm..pt-101": ingest: invalid sensor id: empty token`},
		{"too few fields", "a,1772366400,1", `calibrations line 2: 3 fields, want at least 4`},
		{"bare quote", `a,17723"66400,1,2`, `calibrations line 2: bare " in non-quoted-field`},
	}
	for _, tc := range rows {
		t.Run(tc.name, func(t *testing.T) {
			in := "sensor,time,as_found,as_left\n" + tc.row + "\nok,1772366400,1,2\n"
			cals, bad, err := replay.ReadCalibrations(strings.NewReader(in))
			if err != nil {
				t.Fatal(err)
			}
			var ce *replay.CalibrationError
			if len(bad) != 1 || !errors.As(bad[0], &ce) || !errors.Is(bad[0], replay.ErrCalibrationRow) || !strings.Contains(bad[0].Error(), tc.want) {
				t.Errorf("bad rows = %v, want one *CalibrationError containing %q", bad, tc.want)
			}
			if len(cals) != 1 || cals[0].Sensor != "ok" {
				t.Errorf("good rows = %+v, want the row after the bad one kept", cals)
			}
		})
	}

	heads := []struct {
		name, in, want string
	}{
		{"empty", "", "empty file"},
		{"missing column", "sensor,time,as_found\n", `no column "as_left"`},
		{"named twice", "sensor,time,as_found,as_left,time\n", `column "time" named twice`},
	}
	for _, tc := range heads {
		t.Run(tc.name, func(t *testing.T) {
			_, _, err := replay.ReadCalibrations(strings.NewReader(tc.in))
			if !errors.Is(err, replay.ErrCalibrationHeader) || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("ReadCalibrations(%q) error = %v, want ErrCalibrationHeader with %q", tc.in, err, tc.want)
			}
		})
	}
}

// FuzzReadCalibrations: never a panic; every calibration kept has a
// valid sensor id and finite values and reads back bit for bit when written
// again; every bad row names its line.
func FuzzReadCalibrations(f *testing.F) {
	f.Add("sensor,time,as_found,as_left\nqm.u1.steam.pt-101,2026-03-02T00:00:00Z,502.5,500\n")
	f.Add("as_left,sensor,time,as_found\n1,a,1772366400.123456789,-0\n\"b,c\",\"x\"\"y\",1,2\n")
	f.Add("sensor,time,as_found,as_left\na,soon,1,2\n,1,1,1\na,1,1e999,1\n")
	f.Fuzz(func(t *testing.T, in string) {
		cals, bad, err := replay.ReadCalibrations(strings.NewReader(in))
		if err != nil {
			return
		}
		for _, e := range bad {
			var ce *replay.CalibrationError
			if !errors.As(e, &ce) || ce.Line < 1 {
				t.Fatalf("bad row error %v has no line", e)
			}
		}
		var b strings.Builder
		b.WriteString("sensor,time,as_found,as_left\n")
		for _, c := range cals {
			if ingest.CheckSensorID(c.Sensor) != nil || math.IsInf(c.AsFound, 0) || math.IsNaN(c.AsFound) || math.IsInf(c.AsLeft, 0) || math.IsNaN(c.AsLeft) {
				t.Fatalf("kept a bad calibration %+v", c)
			}
			fmt.Fprintf(&b, "%s,%s,%s,%s\n", csvQuote(c.Sensor), unixSeconds(c.Time.UnixNano()),
				strconv.FormatFloat(c.AsFound, 'g', -1, 64), strconv.FormatFloat(c.AsLeft, 'g', -1, 64))
		}
		again, bad2, err := replay.ReadCalibrations(strings.NewReader(b.String()))
		if err != nil || len(bad2) != 0 || len(again) != len(cals) {
			t.Fatalf("re-read of %q: %d calibrations, bad %v, err %v; want %d", b.String(), len(again), bad2, err, len(cals))
		}
		for i := range cals {
			a, c := again[i], cals[i]
			if a.Sensor != c.Sensor || !a.Time.Equal(c.Time) || math.Float64bits(a.AsFound) != math.Float64bits(c.AsFound) ||
				math.Float64bits(a.AsLeft) != math.Float64bits(c.AsLeft) {
				t.Fatalf("re-read %+v, want %+v", a, c)
			}
		}
	})
}

// csvQuote writes s as one CSV field (RFC 4180).
func csvQuote(s string) string { return `"` + strings.ReplaceAll(s, `"`, `""`) + `"` }

// unixSeconds writes ns as exact decimal seconds, sign first.
func unixSeconds(ns int64) string {
	sign, u := "", uint64(ns)
	if ns < 0 {
		sign, u = "-", -u
	}
	return fmt.Sprintf("%s%d.%09d", sign, u/1e9, u%1e9)
}
