package report

import (
	"encoding/csv"
	"io"
	"strconv"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

// csvWriter writes RFC 4180 (CRLF line ends) with a header, every number
// in its shortest round-trip form (strconv precision -1).
type csvWriter struct {
	o       Options
	cw      *csv.Writer
	row     []string
	started bool
}

func newCSV(w io.Writer, o Options) Writer {
	c := &csvWriter{o: o, cw: csv.NewWriter(w)}
	// RFC 4180 section 2, rule 1: records end with CRLF.
	c.cw.UseCRLF = true
	return c
}

func (c *csvWriter) header(h []string) error {
	if c.started {
		return nil
	}
	c.started = true
	c.row = make([]string, len(h))
	return c.cw.Write(h)
}

// fitCSVHeader names the fit columns. Rates are per day and curvatures
// per day², as the fits compute them; time columns are RFC 3339 in UTC.
// "time" is the record's time, the newest reading in the window when its
// pane closed (for replay, the newest reading).
var fitCSVHeader = []string{
	"time", "sensor", "window", "model", "status", "n", "excluded", "first",
	"c0", "c0_se", "c0_ci95_low", "c0_ci95_high",
	"c1_per_day", "c1_se_per_day", "c1_ci95_low_per_day", "c1_ci95_high_per_day",
	"c2_per_day2", "c2_se_per_day2", "c2_ci95_low_per_day2", "c2_ci95_high_per_day2",
	"resid_sd", "r2", "df", "cond", "pos_def", "doubling_days",
}

func g(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }

func (c *csvWriter) Fit(sensor, window string, sol *rolling.Solution, m rolling.Model) error {
	if err := c.header(fitCSVHeader); err != nil {
		return err
	}
	// Take the fields from the JSON form, so the two formats cannot
	// disagree about what a fit shows (which fields a failed or constant
	// fit has, the doubling time).
	j := NewFitJSON(sensor, window, sol.Fit(m))
	r := c.row
	clear(r)
	r[0] = sol.Last.UTC().Format(time.RFC3339Nano)
	r[1], r[2], r[3], r[4] = j.Sensor, j.Window, j.Model, j.Status
	r[5], r[6], r[7] = strconv.Itoa(j.N), strconv.Itoa(j.Excluded), j.First
	for i := range j.Coef {
		k := 8 + 4*i
		r[k], r[k+1], r[k+2], r[k+3] = g(j.Coef[i]), g(j.SE[i]), g(j.CI95[i][0]), g(j.CI95[i][1])
	}
	if j.ResidSD != nil {
		r[20] = g(*j.ResidSD)
		r[22], r[23], r[24] = strconv.Itoa(j.DF), g(j.Cond), strconv.FormatBool(j.PosDef)
	}
	if j.R2 != nil {
		r[21] = g(*j.R2)
	}
	if j.DoublingDays != nil {
		r[25] = g(*j.DoublingDays)
	}
	return c.cw.Write(r)
}

func (c *csvWriter) Event(ev *alert.Event) error {
	if err := c.header([]string{"at", "type", "sensor", "class", "window", "kind", "severity", "value", "ci95_low", "ci95_high", "limit", "unit", "n"}); err != nil {
		return err
	}
	return c.cw.Write([]string{ev.At.UTC().Format(time.RFC3339), ev.Type.String(), ev.Sensor, ev.Class, ev.Window, ev.Kind.String(),
		ev.Severity.String(), g(ev.Value), g(ev.CI[0]), g(ev.CI[1]), g(ev.Limit), ev.Unit, strconv.Itoa(ev.N)})
}

func (c *csvWriter) Ticket(tk *alert.Ticket) error {
	tk = c.o.ticket(tk)
	if err := c.header([]string{"id", "sensor", "class", "opened", "due", "reason", "severity", "window", "as_left", "tolerance",
		"as_found_deviation", "as_found_low", "as_found_high", "unit", "status", "overdue"}); err != nil {
		return err
	}
	return c.cw.Write([]string{tk.ID, tk.Sensor, tk.Class, tk.Opened.UTC().Format(time.RFC3339), tk.Due.UTC().Format(time.RFC3339),
		tk.Reason.String(), tk.Severity.String(), tk.Window, g(tk.AsLeft), g(tk.Tolerance),
		g(tk.AsFound.Deviation), g(tk.AsFound.Low), g(tk.AsFound.High), tk.Unit, TicketStatus(tk), strconv.FormatBool(tk.Overdue)})
}

func (c *csvWriter) Close() error {
	c.cw.Flush()
	return c.cw.Error()
}
