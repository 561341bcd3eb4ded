package report

import (
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"text/tabwriter"

	"driftfit/alert"
	"driftfit/rolling"
)

// table writes aligned columns for people: numbers rounded to what their
// uncertainty leaves meaningful, with units, ids escaped. The header is
// written with the first record, so no output means no records.
type table struct {
	w       io.Writer
	tw      *tabwriter.Writer
	o       Options
	started bool
	caution bool // end with the alert caution
}

func newTable(w io.Writer, o Options) Writer {
	return &table{w: w, tw: tabwriter.NewWriter(w, 0, 0, 2, ' ', 0), o: o}
}

func (t *table) header(h string) {
	if !t.started {
		t.started = true
		fmt.Fprintln(t.tw, h)
	}
}

// timeFormat is the table's time of day, in UTC.
const timeFormat = "2006-01-02 15:04:05"

func (t *table) Fit(sensor, window string, sol *rolling.Solution, m rolling.Model) error {
	t.header("SENSOR\tWINDOW\tMODEL\tN\tLAST READING (UTC)\tLEVEL\tRATE ±95%\tCURVATURE ±95%\tRESID SD\tR²\tNOTE")
	f := sol.Fit(m)
	unit := t.o.unit(sensor)
	id := EscapeID(sensor)
	last := "-"
	if f.N > 0 {
		last = f.Last.UTC().Format(timeFormat)
	}
	if !f.OK() {
		fmt.Fprintf(t.tw, "%s\t%s\t%s\t%d\t%s\t\t\t\t\t\t%s\n", id, window, f.Model, f.N, last, strings.ReplaceAll(Status(f.Err), "_", " "))
		return nil
	}
	pm := func(j int) string { return Estimate(f.Coef[j], f.TCrit*f.SE[j]) }
	level := WithUnit(pm(0), unit)
	rate := WithUnit(pm(1), perDay(unit, "/d"))
	curv, resid, note := "", WithUnit(Sig(f.ResidSD, 3), unit), ""
	r2 := strconv.FormatFloat(f.R2, 'f', 3, 64)
	switch f.Model {
	case rolling.Parabola:
		curv = WithUnit(pm(2), perDay(unit, "/d²"))
	case rolling.Exp:
		// The level in the sensor's unit: e^c0 is the fitted y now, its
		// interval the exponentials of c0's interval ends.
		level = WithUnit(Round(math.Exp(f.Coef[0]), (math.Exp(f.CI[0][1])-math.Exp(f.CI[0][0]))/2), unit)
		rate = WithUnit(pm(1), "/d") // growth rate of ln y
		resid = Sig(f.ResidSD, 3) + " (ln)"
		if f.Coef[1] != 0 {
			d := math.Ln2 / f.Coef[1]
			if d > 0 {
				note = "doubling " + Sig(d, 3) + " d"
			} else {
				note = "halving " + Sig(-d, 3) + " d"
			}
		}
		if f.Excluded > 0 {
			note = strings.TrimSpace(note + fmt.Sprintf(" (%d readings ≤ 0 left out)", f.Excluded))
		}
	}
	if f.Err != nil {
		r2, note = "-", "constant values"
	}
	if f.Cond > illConditioned {
		note = strings.TrimSpace(note + " ill-conditioned")
	}
	fmt.Fprintf(t.tw, "%s\t%s\t%s\t%d\t%s\t%s\t%s\t%s\t%s\t%s\t%s\n", id, window, f.Model, f.N, last, level, rate, curv, resid, r2, note)
	return nil
}

// perDay is the unit of a rate of unit per day; with no unit known, the
// bare "/d" still says "per day".
func perDay(unit, suffix string) string { return unit + suffix }

// interval formats an estimate and its 95% interval [lo, hi], rounded by
// the interval's half-width.
func interval(v, lo, hi float64) string {
	u := (hi - lo) / 2
	return Round(v, u) + " [" + Round(lo, u) + ", " + Round(hi, u) + "]"
}

func (t *table) Event(ev *alert.Event) error {
	t.header("AT (UTC)\tTYPE\tSENSOR\tWINDOW\tKIND\tSEVERITY\tVALUE [95%]\tLIMIT\tUNIT\tN")
	t.caution = true
	fmt.Fprintf(t.tw, "%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%d\n", ev.At.UTC().Format("2006-01-02 15:04"), ev.Type, EscapeID(ev.Sensor), ev.Window,
		ev.Kind, ev.Severity, interval(ev.Value, ev.CI[0], ev.CI[1]), Sig(ev.Limit, 4), ev.Unit, ev.N)
	return nil
}

func (t *table) Ticket(tk *alert.Ticket) error {
	tk = t.o.ticket(tk)
	t.header("DUE (UTC)\tSENSOR\tREASON\tSEVERITY\tWINDOW\tAS-FOUND DEVIATION [95%]\tTOLERANCE\tUNIT\tSTATUS")
	t.caution = true
	a := tk.AsFound
	fmt.Fprintf(t.tw, "%s\t%s\t%s\t%s\t%s\t%s\t±%s\t%s\t%s\n", tk.Due.UTC().Format("2006-01-02"), EscapeID(tk.Sensor), tk.Reason, tk.Severity, tk.Window,
		interval(a.Deviation, a.Low, a.High), Sig(tk.Tolerance, 4), tk.Unit, TicketStatus(tk))
	return nil
}

func (t *table) Close() error {
	if err := t.tw.Flush(); err != nil {
		return err
	}
	if t.caution {
		_, err := fmt.Fprintln(t.w, "\n"+alert.Caution)
		return err
	}
	return nil
}

// TicketStatus is "open", with ", reopened" when a voided calibration
// reopened it (alert.Ticket.Amendments) and ", overdue" when it is
// (alert.Ticket.Overdue), or "closed" and the calibration's date.
func TicketStatus(tk *alert.Ticket) string {
	if tk.Calibration == nil {
		s := "open"
		if n := len(tk.Amendments); n > 0 && tk.Amendments[n-1].Action == alert.AmendVoided {
			s += ", reopened"
		}
		if tk.Overdue {
			s += ", overdue"
		}
		return s
	}
	return "closed " + tk.Calibration.Time.UTC().Format("2006-01-02")
}
