package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"slices"
	"strings"

	"driftfit/ingest"
	"driftfit/rolling"
)

// maxShownErrors bounds the bad rows printed one by one; the rest are
// only counted, so a broken file cannot flood the terminal.
const maxShownErrors = 20

func runReplay(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("replay", flag.ContinueOnError)
	fs.SetOutput(stderr)
	windows := fs.String("window", "1d/1h,30d/1d", "comma-separated window spans, each optionally with its pane width (`SPAN[/PANE],...`)")
	pane := fs.String("pane", "", "pane width for windows given without one (e.g. 1h)")
	format := fs.String("format", "table", "output format: table or json (one object per line)")
	strict := fs.Bool("strict", false, "stop at the first bad row")
	fs.Usage = func() {
		fmt.Fprintln(stderr, "Usage: driftfit replay [flags] FILE.csv|-\n\nFeeds every row of a CSV file (header sensor,time,value; time as RFC 3339 or\nUnix seconds) through the sliding fits in file order and prints the final fits\nof every sensor, window and model, sorted by sensor, window span and model.\n\nFlags:")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		return err
	}
	if fs.NArg() != 1 {
		fs.Usage()
		return usageError("want one input file (or - for standard input)")
	}
	if *format != "table" && *format != "json" {
		return usageError("--format %q: want table or json", *format)
	}
	wins, err := parseWindows(*windows, *pane)
	if err != nil {
		return err
	}
	in := stdin
	if name := fs.Arg(0); name != "-" {
		f, err := os.Open(name)
		if err != nil {
			return err
		}
		defer f.Close()
		in = f
	}
	rp, err := replay(ctx, in, wins, *strict, stderr)
	if err != nil {
		return err
	}
	if err := rp.print(stdout, *format); err != nil {
		return err
	}
	return rp.summary(stderr)
}

// replayer feeds CSV rows to per-sensor fits.
type replayer struct {
	wins    []windowArg
	specs   []rolling.WindowSpec
	sensors map[string]*replaySensor // written by the parser goroutine until it ends
	rows    int
	bad     int
	tooOld  int
	shown   int
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

func replay(ctx context.Context, in io.Reader, wins []windowArg, strict bool, stderr io.Writer) (*replayer, error) {
	rp := &replayer{wins: wins, sensors: map[string]*replaySensor{}}
	for _, w := range wins {
		rp.specs = append(rp.specs, w.spec)
	}
	cr, err := ingest.NewCSVReader(in)
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
			rp.rows++
			err := c.errs[i]
			if err == nil {
				e := c.sensors[i]
				if err = e.s.Add(c.rds[i]); err != nil {
					err = fmt.Errorf("line %d: sensor %q: %w", c.lines[i], e.id, err)
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
func (rp *replayer) lookup(id []byte) *replaySensor {
	e := rp.sensors[string(id)]
	if e == nil {
		s, _ := rolling.NewSensor(rp.specs...) // specs were checked by parseWindows
		e = &replaySensor{id: string(id), s: s}
		rp.sensors[e.id] = e
	}
	return e
}

func (rp *replayer) print(w io.Writer, format string) error {
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
		wa, wb := rp.wins[a].spec, rp.wins[b].spec
		if wa.Span != wb.Span {
			return int(wa.Span - wb.Span)
		}
		return int(wa.Pane - wb.Pane)
	})
	var table *fitTable
	if format == "table" {
		table = newFitTable(w)
	}
	for _, id := range ids {
		s := rp.sensors[id].s
		for _, i := range order {
			sol := s.Solve(i)
			for _, m := range rolling.Models {
				f := sol.Fit(m)
				if table != nil {
					table.add(id, rp.wins[i].label, f)
					continue
				}
				if err := writeFitJSON(w, newFitJSON(id, rp.wins[i].label, f)); err != nil {
					return err
				}
			}
		}
	}
	if table != nil {
		return table.flush()
	}
	return nil
}

// summary reports what was not used, per window, so no reading goes
// missing without a word.
func (rp *replayer) summary(w io.Writer) error {
	if rp.bad == 0 && !rp.anyLate() {
		return nil
	}
	var b strings.Builder
	fmt.Fprintf(&b, "driftfit replay: %d rows, %d sensors; %d bad rows", rp.rows, len(rp.sensors), rp.bad)
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
			fmt.Fprintf(&b, "; window %s turned away %d late readings", wa.label, late)
		}
	}
	fmt.Fprintln(w, b.String())
	return nil
}

func (rp *replayer) anyLate() bool {
	for _, e := range rp.sensors {
		for i := range rp.wins {
			if e.s.Late(i) > 0 {
				return true
			}
		}
	}
	return false
}
