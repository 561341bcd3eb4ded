package report

import (
	"encoding/json"
	"io"

	"driftfit/alert"
	"driftfit/rolling"
)

// jsonWriter writes one JSON object per line: fits as FitJSON (the same
// for replay and history, so the two compare line for line), events and
// tickets in the alert package's wire form.
type jsonWriter struct {
	w   io.Writer
	o   Options
	buf []byte
}

func newJSON(w io.Writer, o Options) Writer { return &jsonWriter{w: w, o: o} }

func (j *jsonWriter) line(v any) error {
	b, err := json.Marshal(v)
	if err != nil {
		return err
	}
	j.buf = append(append(j.buf[:0], b...), '\n')
	_, err = j.w.Write(j.buf)
	return err
}

func (j *jsonWriter) Fit(sensor, window string, sol *rolling.Solution, m rolling.Model) error {
	return j.line(NewFitJSON(sensor, window, sol.Fit(m)))
}

func (j *jsonWriter) Event(ev *alert.Event) error   { return j.line(ev) }
func (j *jsonWriter) Ticket(tk *alert.Ticket) error { return j.line(j.o.ticket(tk)) }
func (j *jsonWriter) Close() error                  { return nil }
