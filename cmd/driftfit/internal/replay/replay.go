// Package replay feeds readings from a CSV file through the sliding fits
// in file order, as the live service would meet them, and gives the
// final fit of every sensor, window and model.
package replay

import (
	"context"
	"errors"
	"fmt"
	"io"
	"slices"
	"strconv"
	"strings"
	"time"

	"driftfit/cmd/driftfit/internal/report"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/rolling"
)

// maxShownErrors bounds the bad rows printed one by one; the rest are
// only counted, so a broken file cannot flood the terminal.
const maxShownErrors = 20

// Window is a window as the user wrote it, and its spec.
type Window struct {
	Label string
	Spec  rolling.WindowSpec
}

// MaxPanes bounds the panes of one window (span / pane), the limit the
// configuration applies to its windows too ("at most 100,000 panes", see
// the README's defaults section). A ring is allocated whole with a
// sensor's first reading, 128 bytes a pane: 100,000 panes are 12.8 MB a
// sensor, while a typing slip such as 1h/1ns asks for 3.6e12 panes.
const MaxPanes = 100000

// WindowError is a --window or --pane value that is not a window.
type WindowError struct {
	Flag, Value, Want string
	// Err is rolling.ErrBadSpec (possibly wrapped) when the engine or
	// the pane cap refused the window, nil for a value that does not
	// parse.
	Err error
}

func (e *WindowError) Error() string { return fmt.Sprintf("--%s %q: %s", e.Flag, e.Value, e.Want) }

// Unwrap returns the cause, if any.
func (e *WindowError) Unwrap() error { return e.Err }

// ParseWindows parses a comma-separated list of window spans, each
// optionally with its own pane width after a slash ("1d,30d/1d"); pane is
// the width for the others. Errors are *WindowError.
func ParseWindows(list, pane string) ([]Window, error) {
	var defPane time.Duration
	if pane != "" {
		d, err := configs.ParseDuration(pane)
		if err != nil {
			return nil, &WindowError{Flag: "pane", Value: pane, Want: err.Error()}
		}
		defPane = d
	}
	var out []Window
	for _, item := range strings.Split(list, ",") {
		item = strings.TrimSpace(item)
		spanText, paneText, hasPane := strings.Cut(item, "/")
		span, err := configs.ParseDuration(spanText)
		if err != nil {
			return nil, &WindowError{Flag: "window", Value: item, Want: err.Error()}
		}
		p := defPane
		if hasPane {
			if p, err = configs.ParseDuration(paneText); err != nil {
				return nil, &WindowError{Flag: "window", Value: item, Want: "pane: " + err.Error()}
			}
		}
		if p == 0 {
			return nil, &WindowError{Flag: "window", Value: item, Want: "no pane width: give --pane or write span/pane"}
		}
		spec := rolling.WindowSpec{Span: span, Pane: p}
		// The cap is checked before the engine sees the spec: NewSensor
		// allocates the ring at once.
		if p > 0 && span > 0 && span/p > MaxPanes {
			return nil, &WindowError{Flag: "window", Value: item, Err: rolling.ErrBadSpec,
				Want: fmt.Sprintf("%d panes of %s in a span of %s; at most %d", span/p, configs.FormatDuration(p), configs.FormatDuration(span), MaxPanes)}
		}
		if _, err := rolling.NewSensor(spec); err != nil {
			return nil, &WindowError{Flag: "window", Value: item, Want: err.Error(), Err: err}
		}
		out = append(out, Window{Label: item, Spec: spec})
	}
	return out, nil
}

// Options are the settings of one replay.
type Options struct {
	Windows []Window
	CSV     ingest.CSVOptions
	// Strict stops at the first bad row with its error.
	Strict bool
	// Errors receives the first bad rows, one a line, and the summary.
	Errors io.Writer
}

// Result is the sensors of a replay, their fits and what was not used.
type Result struct {
	wins    []Window
	specs   []rolling.WindowSpec
	sensors map[string]*replaySensor // written by the parser goroutine until it ends
	// Rows is the count of data rows read, good and bad.
	Rows   int
	bad    int
	tooOld int
	shown  int
}

// replayChunk is a run of parsed rows handed from the parser to the
// applier, so parsing and fitting run on two cores.
type replayChunk struct {
	sensors []*replaySensor // nil for a bad row
	rds     []rolling.Reading
	lines   []int
	errs    []error // per row; nil for a good row
}

const replayChunkRows = 4096

func (c *replayChunk) reset() {
	clear(c.sensors)
	c.sensors, c.rds, c.lines, c.errs = c.sensors[:0], c.rds[:0], c.lines[:0], c.errs[:0]
}

// Run reads the CSV of in and folds every good row into its sensor's
// windows, on two goroutines (parsing, fitting). Bad rows are counted,
// the first maxShownErrors shown on o.Errors, and skipped; with o.Strict
// the first ends the run with its error.
func Run(ctx context.Context, in io.Reader, o Options) (*Result, error) {
	rp := &Result{wins: o.Windows, sensors: map[string]*replaySensor{}}
	for _, w := range o.Windows {
		rp.specs = append(rp.specs, w.Spec)
	}
	strict, stderr := o.Strict, o.Errors
	if stderr == nil {
		stderr = io.Discard
	}
	cr, err := ingest.NewCSVReaderOptions(in, o.CSV)
	if err != nil {
		return nil, err
	}
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	full := make(chan *replayChunk, 4)
	free := make(chan *replayChunk, 6)
	for range cap(free) {
		free <- &replayChunk{}
	}
	parseErr := make(chan error, 1)
	go func() {
		defer close(full)
		c := <-free
		for cr.Next() {
			id, rd, err := cr.Row()
			var e *replaySensor
			if err == nil {
				e = rp.lookup(id)
			}
			c.sensors = append(c.sensors, e)
			c.rds = append(c.rds, rd)
			c.lines = append(c.lines, cr.Line())
			c.errs = append(c.errs, err)
			if len(c.rds) < replayChunkRows {
				continue
			}
			select {
			case full <- c:
			case <-ctx.Done():
				parseErr <- ctx.Err()
				return
			}
			select {
			case c = <-free:
			case <-ctx.Done():
				parseErr <- ctx.Err()
				return
			}
		}
		if len(c.rds) > 0 {
			select {
			case full <- c:
			case <-ctx.Done():
				parseErr <- ctx.Err()
				return
			}
		}
		parseErr <- cr.Err()
	}()
	for c := range full {
		if ctx.Err() != nil {
			return nil, ctx.Err()
		}
		for i := range c.rds {
			rp.Rows++
			err := c.errs[i]
			if err == nil {
				e := c.sensors[i]
				if err = e.s.Add(c.rds[i]); err != nil {
					err = fmt.Errorf("line %d: sensor %s: %w", c.lines[i], strconv.Quote(e.id), err)
				}
			}
			if err == nil {
				continue
			}
			if strict {
				return nil, err
			}
			rp.bad++
			if errors.Is(err, rolling.ErrTooOld) {
				rp.tooOld++
			}
			if rp.shown < maxShownErrors {
				rp.shown++
				fmt.Fprintf(stderr, "driftfit replay: %v\n", err)
			}
		}
		c.reset()
		free <- c
	}
	if err := <-parseErr; err != nil {
		return nil, err
	}
	return rp, nil
}

// replaySensor is one sensor of the file. The parser goroutine finds and
// makes them (it alone uses the map); the applier alone touches s.
type replaySensor struct {
	id string
	s  *rolling.Sensor
}

// lookup returns the sensor of id, making it on first sight: one hash
// of the id per row, and no copy of it but the first.
func (rp *Result) lookup(id []byte) *replaySensor {
	e := rp.sensors[string(id)]
	if e == nil {
		s, _ := rolling.NewSensor(rp.specs...) // specs were checked by ParseWindows
		e = &replaySensor{id: string(id), s: s}
		rp.sensors[e.id] = e
	}
	return e
}

// Write gives out every final fit, sorted by sensor, window span (then
// pane) and model.
func (rp *Result) Write(out report.Writer) error {
	ids := make([]string, 0, len(rp.sensors))
	for id := range rp.sensors {
		ids = append(ids, id)
	}
	slices.Sort(ids)
	order := make([]int, len(rp.wins))
	for i := range order {
		order[i] = i
	}
	slices.SortStableFunc(order, func(a, b int) int {
		wa, wb := rp.wins[a].Spec, rp.wins[b].Spec
		if wa.Span != wb.Span {
			return int(wa.Span - wb.Span)
		}
		return int(wa.Pane - wb.Pane)
	})
	for _, id := range ids {
		s := rp.sensors[id].s
		for _, i := range order {
			sol := s.Solve(i)
			for _, m := range rolling.Models {
				if err := out.Fit(id, rp.wins[i].Label, &sol, m); err != nil {
					return err
				}
			}
		}
	}
	return nil
}

// Summary reports on w what was not used, per window, so no reading
// goes missing without a word; nothing when everything was used.
func (rp *Result) Summary(w io.Writer) error {
	if rp.bad == 0 && !rp.anyLate() {
		return nil
	}
	var b strings.Builder
	fmt.Fprintf(&b, "driftfit replay: %d rows, %d sensors; %d bad rows", rp.Rows, len(rp.sensors), rp.bad)
	if rp.tooOld > 0 {
		fmt.Fprintf(&b, " (%d older than every window)", rp.tooOld)
	}
	if rp.bad > rp.shown {
		fmt.Fprintf(&b, ", %d not shown", rp.bad-rp.shown)
	}
	for i, wa := range rp.wins {
		var late uint64
		for _, e := range rp.sensors {
			late += e.s.Late(i)
		}
		if late > 0 {
			fmt.Fprintf(&b, "; window %s turned away %d late readings", wa.Label, late)
		}
	}
	_, err := fmt.Fprintln(w, b.String())
	return err
}

func (rp *Result) anyLate() bool {
	for _, e := range rp.sensors {
		for i := range rp.wins {
			if e.s.Late(i) > 0 {
				return true
			}
		}
	}
	return false
}
