package report

import (
	"bytes"
	"encoding/xml"
	"io"
	"math"
	"slices"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/chart"
	"driftfit/rolling"
)

// reviewSolutions are the fit records of an invented transmitter with a
// 7d/1d window and a reading every hour for 30 days: 100 kPa rising by
// 0.2 kPa/day, a daily swing of ±0.5 kPa, and one wild reading of
// 5000 kPa in the first hour, which makes the first week's fits
// useless until it leaves the window. A record is written at each pane
// close, as the service does.
func reviewSolutions(t *testing.T) []rolling.Solution {
	t.Helper()
	spec := rolling.WindowSpec{Span: 7 * 24 * time.Hour, Pane: 24 * time.Hour}
	s, err := rolling.NewSensor(spec)
	if err != nil {
		t.Fatal(err)
	}
	var out []rolling.Solution
	for k := range 30 * 24 {
		at := reviewStart.Add(time.Duration(k) * time.Hour)
		if s.Closes(at.UnixNano()) != 0 {
			out = append(out, s.Solve(0))
		}
		v := 100 + 0.2*float64(k)/24 + 0.5*math.Sin(2*math.Pi*float64(k)/24)
		if k == 1 {
			v = 5000
		}
		if err := s.Add(rolling.Reading{UnixNano: at.UnixNano(), Value: v}); err != nil {
			t.Fatal(err)
		}
	}
	return out
}

var reviewStart = time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)

func day(d float64) time.Time { return reviewStart.Add(time.Duration(d * float64(24*time.Hour))) }

// reviewAnnotations: a critical slope alert on day 12 at the record's
// slope, a ticket opened with it and due on day 40, closed by a
// calibration on day 20 that left the sensor at 101 kPa; before it the
// configured as-left of 100 kPa, tolerance ±2 kPa.
func reviewAnnotations(sols []rolling.Solution) *Annotations {
	var at12 *rolling.Solution
	for i := range sols {
		if !sols[i].Last.Before(day(12)) {
			at12 = &sols[i]
			break
		}
	}
	al := 101.0
	tk := alert.Ticket{ID: "qm.t.pt-1@20260313T000000Z", Sensor: "qm.t.pt-1", Opened: at12.Last, Due: day(40), Severity: alert.Critical,
		Reason: alert.Slope, Unit: "kPa", AsLeft: 100, Tolerance: 2,
		Calibration: &alert.Calibration{Time: day(20), AsFound: 101.6, AsLeft: al}}
	evs := []alert.Event{
		{Type: alert.Raised, Sensor: "qm.t.pt-1", Window: "7d/1d", Kind: alert.Slope, Severity: alert.Critical, At: at12.Last, Value: at12.Line.Coef[1], Limit: 0.1, Unit: "kPa/d"},
		{Type: alert.Reset, Sensor: "qm.t.pt-1", Window: "7d/1d", Kind: alert.Slope, Severity: alert.Critical, At: day(20), Unit: "kPa/d"},
		// Another window's alert stays out of this window's column.
		{Type: alert.Raised, Sensor: "qm.t.pt-1", Window: "1d/1h", Kind: alert.Slope, Severity: alert.Warning, At: day(13), Value: 3, Limit: 0.05, Unit: "kPa/d"},
	}
	return &Annotations{
		Tolerance: 2,
		AsLeft:    []AsLeft{{Value: 100, Source: "configuration"}, {Value: al, Since: day(20), Source: "calibration 2026-03-21"}},
		Limits:    Limits{SlopeWarning: 0.05, SlopeCritical: 0.1},
		Models:    []rolling.Model{rolling.Line},
		Events:    evs, Tickets: []alert.Ticket{tk},
		Calibrations: chart.Calibrations([]alert.Ticket{tk}, evs),
	}
}

func reviewSeries(sols []rolling.Solution) []plotSeries {
	p := &picture{}
	for i := range sols {
		_ = p.Fit("qm.t.pt-1", "7d/1d", &sols[i], rolling.Line)
	}
	return p.series
}

func TestBuildFigure_Annotations(t *testing.T) {
	sols := reviewSolutions(t)
	an := reviewAnnotations(sols)
	fig := buildFigure("qm.t.pt-1", "kPa", reviewSeries(sols), an)

	// The time axis starts at the first record and stretches to the
	// ticket's due date (day 40, within three quarters of the 29-day
	// span past the last record), plus 2%.
	first, last := unixSeconds(sols[0].Last), unixSeconds(sols[len(sols)-1].Last)
	if fig.from != first {
		t.Errorf("axis starts at %v, want the first record %v", unixTime(fig.from), sols[0].Last)
	}
	if due := unixSeconds(day(40)); fig.to != due+0.02*(due-first) {
		t.Errorf("axis ends at %v, want the due date %v plus 2%%", unixTime(fig.to), day(40))
	}
	_ = last
	if len(fig.cols) != 1 || len(fig.cols[0].panels) != 2 {
		t.Fatalf("%d columns, want 1 with level and slope panels", len(fig.cols))
	}
	level, slope := fig.cols[0].panels[0], fig.cols[0].panels[1]

	// Tolerance band: 100 ± 2 from the axis start to the calibration,
	// then 101 ± 2 to the axis end.
	cal := unixSeconds(day(20))
	wantBands := []box{{fig.from, cal, 98, 102}, {cal, fig.to, 99, 103}}
	if len(level.bands) != len(wantBands) {
		t.Fatalf("bands %v, want %v", level.bands, wantBands)
	}
	for i, b := range wantBands {
		if level.bands[i] != b {
			t.Errorf("band %d = %+v, want %+v", i, level.bands[i], b)
		}
	}
	wantLines := map[hline]bool{
		{asLeftLine, fig.from, cal, 100}: true, {asLeftLine, cal, fig.to, 101}: true,
		{toleranceEdge, fig.from, cal, 98}: true, {toleranceEdge, fig.from, cal, 102}: true,
		{toleranceEdge, cal, fig.to, 99}: true, {toleranceEdge, cal, fig.to, 103}: true,
	}
	checkLines(t, "level", level.hlines, wantLines)
	checkLines(t, "slope", slope.hlines, map[hline]bool{
		{zeroLine, fig.from, fig.to, 0}:       true,
		{warningLine, fig.from, fig.to, 0.05}: true, {warningLine, fig.from, fig.to, -0.05}: true,
		{criticalLine, fig.from, fig.to, 0.1}: true, {criticalLine, fig.from, fig.to, -0.1}: true,
	})

	// The slope alert sits on the slope curve at its record; the other
	// window's alert is not in this column.
	ev := an.Events[0]
	if len(slope.marks) != 1 || slope.marks[0] != (mark{kind: markRaised, critical: true, t: unixSeconds(ev.At), y: ev.Value}) {
		t.Errorf("slope panel marks %+v, want the critical raise at %v, %v", slope.marks, ev.At, ev.Value)
	}
	tk := an.Tickets[0]
	wantStrip := map[mark]bool{
		{kind: markRaised, critical: true, t: unixSeconds(ev.At), y: alertRow}:            true,
		{kind: markEnded, critical: true, t: cal, y: alertRow}:                            true,
		{kind: markTicketOpened, critical: true, t: unixSeconds(tk.Opened), y: ticketRow}: true,
		{kind: markTicketDue, critical: true, t: unixSeconds(tk.Due), y: ticketRow}:       true,
		{kind: markTicketClosed, t: cal, y: ticketRow}:                                    true,
		{kind: markCalibration, t: cal, y: calibrationRow}:                                true,
	}
	if len(fig.cols[0].strip) != len(wantStrip) {
		t.Errorf("strip %+v, want %d marks", fig.cols[0].strip, len(wantStrip))
	}
	for _, m := range fig.cols[0].strip {
		if !wantStrip[m] {
			t.Errorf("strip mark %+v not expected", m)
		}
	}
	for _, p := range []panel{level, slope} {
		if len(p.vlines) != 1 || p.vlines[0] != cal {
			t.Errorf("panel %d calibration rules %v, want one at %v", p.kind, p.vlines, day(20))
		}
	}
}

// TestBuildFigure_VoidedCalibration adds to the review a calibration on
// day 15 voided on day 17 and one on day 25 corrected by another at the
// same time: the voided one is a struck ring without a rule, named in
// the legend with its reason; the corrected one is not drawn, its
// correction is, with a rule.
func TestBuildFigure_VoidedCalibration(t *testing.T) {
	sols := reviewSolutions(t)
	an := reviewAnnotations(sols)
	v, c, d := 100.4, 101.2, 101.3
	an.Calibrations = append(an.Calibrations,
		chart.Calibration{Time: day(15), AsFound: &v, AsLeft: &v, Seq: 1, Voided: day(17), Reason: "entered for the wrong tag"},
		chart.Calibration{Time: day(25), AsFound: &c, AsLeft: &c, Seq: 3, Corrected: day(26), CorrectedBy: 4, Reason: "misread"},
		chart.Calibration{Time: day(25), AsFound: &d, AsLeft: &d, Seq: 4, Corrects: 3})
	fig := buildFigure("qm.t.pt-1", "kPa", reviewSeries(sols), an)
	kinds := map[markKind][]float64{}
	for _, m := range fig.cols[0].strip {
		if m.y == calibrationRow {
			kinds[m.kind] = append(kinds[m.kind], m.t)
		}
	}
	cal, v15, c25 := unixSeconds(day(20)), unixSeconds(day(15)), unixSeconds(day(25))
	if !slices.Equal(kinds[markCalibration], []float64{cal, c25}) || !slices.Equal(kinds[markVoided], []float64{v15}) {
		t.Errorf("calibration row %v, want calibrations at days 20 and 25 and a voided one at day 15", kinds)
	}
	if rules := fig.cols[0].panels[0].vlines; !slices.Equal(rules, []float64{cal, c25}) {
		t.Errorf("calibration rules %v, want days 20 and 25 only", rules)
	}
	const note = `calibration no. 1 of 2026-03-16 (as-left 100.4 kPa) voided 2026-03-18: "entered for the wrong tag"`
	if !fig.legend.voided || !slices.Contains(fig.legend.notes, note) {
		t.Errorf("legend voided %v, notes %q; want the note %q", fig.legend.voided, fig.legend.notes, note)
	}
	svg := drawSVG(t, fig)
	for _, s := range []string{"voided calibration (each named in this legend)", "entered for the wrong tag"} {
		if !bytes.Contains(svg, []byte(s)) {
			t.Errorf("SVG lacks the text %q", s)
		}
	}
}

func checkLines(t *testing.T, name string, got []hline, want map[hline]bool) {
	t.Helper()
	if len(got) != len(want) {
		t.Errorf("%s lines %+v, want %d", name, got, len(want))
	}
	for _, l := range got {
		if !want[l] {
			t.Errorf("%s line %+v not expected", name, l)
		}
	}
}

// TestBuildFigure_RobustAxis checks that the wild first week does not
// set the value axes: the records whose window holds the 5000 kPa
// reading have levels hundreds of kPa off, and the axes hold the other
// records' estimates and the band, not those.
func TestBuildFigure_RobustAxis(t *testing.T) {
	sols := reviewSolutions(t)
	fig := buildFigure("qm.t.pt-1", "kPa", reviewSeries(sols), reviewAnnotations(sols))
	level, slope := fig.cols[0].panels[0], fig.cols[0].panels[1]
	wild, offLevel := 0, 0
	for i := range sols {
		s := &sols[i]
		f := &s.Line
		if !f.OK() {
			continue
		}
		holdsWild := !s.First.After(reviewStart.Add(time.Hour))
		if holdsWild {
			wild++
			if f.Coef[0] < level.lo || f.Coef[0] > level.hi {
				offLevel++
			}
			continue
		}
		// Every other record is on both scales.
		if f.Coef[0] < level.lo || f.Coef[0] > level.hi {
			t.Errorf("record %v: level %v outside the axis [%v, %v]", s.Last, f.Coef[0], level.lo, level.hi)
		}
		if f.Coef[1] < slope.lo || f.Coef[1] > slope.hi {
			t.Errorf("record %v: slope %v outside the axis [%v, %v]", s.Last, f.Coef[1], slope.lo, slope.hi)
		}
	}
	// The wild reading stays in the 7-day window for its first 7
	// records (pane closes at days 1..7), of 29.
	if wild != 7 {
		t.Fatalf("%d records hold the wild reading, want 7", wild)
	}
	// The level axis must not reach the wild levels (the first record's
	// is the mean of 5000 and 23 readings near 100, about 304 kPa):
	// it spans the band 98..103 and the settled levels, with margins.
	if level.hi > 120 || offLevel == 0 || level.offScale != offLevel {
		t.Errorf("level axis [%v, %v], %d of %d wild records off it (panel counts %d): want the wild ones off", level.lo, level.hi, offLevel, wild, level.offScale)
	}
}

// drawSVG draws fig as SVG and returns the file's bytes.
func drawSVG(t *testing.T, fig *figure) []byte {
	t.Helper()
	c, err := drawFigure(true, fig)
	if err != nil {
		t.Fatal(err)
	}
	var b bytes.Buffer
	if _, err := c.WriteTo(&b); err != nil {
		t.Fatal(err)
	}
	return b.Bytes()
}

func TestDrawFigure_SVG(t *testing.T) {
	sols := reviewSolutions(t)
	fig := buildFigure("qm.t.pt-1", "kPa", reviewSeries(sols), reviewAnnotations(sols))
	svg := drawSVG(t, fig)
	dec := xml.NewDecoder(bytes.NewReader(svg))
	for {
		_, err := dec.Token()
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatalf("SVG is not well-formed XML: %v", err)
		}
	}
	for _, s := range []string{"level (kPa)", "drift rate (kPa/day)", "tolerance band: as-left ± 2 kPa",
		"as-left 100 kPa (configuration), then 101 kPa (calibration 2026-03-21)", "slope warning ±0.05 kPa/day, critical ±0.1 kPa/day",
		"ticket opened, due, closed", "calibration", "alerts", "tickets", "calibrations"} {
		if !bytes.Contains(svg, []byte(s)) {
			t.Errorf("SVG lacks the text %q", s)
		}
	}
}

func TestBuildFigure_Panels(t *testing.T) {
	sols := reviewSolutions(t)
	series := reviewSeries(sols)
	for _, tc := range []struct {
		name   string
		an     *Annotations
		unit   string
		want   []panelKind
		labels []string
	}{
		{"no annotations", nil, "", []panelKind{levelPanel, slopePanel}, []string{"level", "drift rate (per day)"}},
		{"parabola", &Annotations{Trend: rolling.Parabola, Models: []rolling.Model{rolling.Line, rolling.Parabola}}, "degC",
			[]panelKind{levelPanel, slopePanel, curvaturePanel}, []string{"level (degC)", "drift rate (degC/day)", "curvature (degC/day²)"}},
		{"doubling", &Annotations{Models: []rolling.Model{rolling.Line, rolling.Exp}, Limits: Limits{DoublingCritical: 60 * 24 * time.Hour}}, "mm/s",
			[]panelKind{levelPanel, slopePanel, growthPanel}, []string{"level (mm/s)", "drift rate (mm/s/day)", "growth rate (1/day)"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			fig := buildFigure("qm.t.pt-1", tc.unit, series, tc.an)
			ps := fig.cols[0].panels
			if len(ps) != len(tc.want) {
				t.Fatalf("%d panels, want %d", len(ps), len(tc.want))
			}
			for i, p := range ps {
				if p.kind != tc.want[i] || p.ylabel != tc.labels[i] {
					t.Errorf("panel %d = %d %q, want %d %q", i, p.kind, p.ylabel, tc.want[i], tc.labels[i])
				}
			}
			if tc.name == "doubling" {
				// The critical doubling time of 60 d is a growth rate of
				// ln 2 / 60 per day.
				g := ps[2]
				found := false
				for _, l := range g.hlines {
					found = found || (l.kind == criticalLine && math.Abs(l.y-math.Ln2/60) < 1e-15)
				}
				if !found {
					t.Errorf("growth panel lines %+v lack the critical level ln 2/60", g.hlines)
				}
			}
		})
	}
}
