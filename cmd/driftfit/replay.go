package main

import (
	"context"
	"io"
	"os"
	"strings"
	"time"

	"driftfit/cmd/driftfit/internal/replay"
	"driftfit/cmd/driftfit/internal/report"
)

const replayHelp = `Usage: driftfit replay [flags] FILE.csv|-

Feeds every row of a CSV file through the sliding fits in file order and
prints the final fits of every sensor, window and model, sorted by sensor,
window span and model.

The file has a header naming its columns; by default sensor, time and value
(any order, other columns ignored), or the names --columns gives. Times are
RFC 3339, Unix seconds, or wall-clock times without offset as a process
historian writes them ("2026-03-01 12:00:00", also with a T or a fraction of
a second), read in --time-zone. A wall-clock time that a change to summer
time skips moves forward by the change; one that repeats when summer time
ends is taken at its first occurrence.`

func runReplay(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) error {
	fs := newFlags("replay", replayHelp)
	windows := fs.String("window", "1d/1h,30d/1d", "comma-separated window spans, each optionally with its pane width (`SPAN[/PANE],...`)")
	pane := fs.String("pane", "", "pane width for windows given without one (e.g. 1h)")
	format := fs.String("format", "table", "output format: "+strings.Join(report.Names(report.Fits), ", ")+" (json: one object per line)")
	strict := fs.Bool("strict", false, "stop at the first bad row")
	columns := fs.String("columns", "", "header names of the columns, e.g. `sensor=Tag,time=Timestamp,value=Value` (default sensor, time, value)")
	delimiter := fs.String("delimiter", ",", "field delimiter, one character such as ';' or '\\t' for a tab")
	zone := fs.String("time-zone", "UTC", "IANA time `ZONE` of wall-clock times without offset, e.g. Europe/Berlin")
	pos, err := fs.parse(args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		return usageError("want one input file (or - for standard input), got %d arguments", len(pos))
	}
	out, err := report.New(*format, report.Fits, stdout, report.Options{})
	if err != nil {
		return usageError("--format %v", err)
	}
	o := replay.Options{Strict: *strict, Errors: stderr}
	if o.Windows, err = replay.ParseWindows(*windows, *pane); err != nil {
		return err
	}
	if o.CSV.Location, err = time.LoadLocation(*zone); err != nil || *zone == "" || *zone == "Local" {
		return usageError("--time-zone %q: want an IANA zone name such as UTC or Europe/Berlin", *zone)
	}
	switch d := strings.ReplaceAll(*delimiter, `\t`, "\t"); {
	case len(d) != 1 || d == `"` || d == "\r" || d == "\n":
		return usageError("--delimiter %q: want one character other than a quote or line end, such as ';'", *delimiter)
	default:
		o.CSV.Comma = d[0]
	}
	if *columns != "" {
		for _, kv := range strings.Split(*columns, ",") {
			k, v, ok := strings.Cut(kv, "=")
			switch {
			case !ok || v == "":
				return usageError("--columns %q: want sensor=NAME,time=NAME,value=NAME", *columns)
			case k == "sensor":
				o.CSV.Sensor = v
			case k == "time":
				o.CSV.Time = v
			case k == "value":
				o.CSV.Value = v
			default:
				return usageError("--columns %q: %q is not one of sensor, time, value", *columns, k)
			}
		}
	}
	in := stdin
	if name := pos[0]; name != "-" {
		f, err := os.Open(name)
		if err != nil {
			return err
		}
		defer f.Close()
		in = f
	}
	rp, err := replay.Run(ctx, in, o)
	if err != nil {
		return err
	}
	if err := rp.Write(out); err != nil {
		return err
	}
	if err := out.Close(); err != nil {
		return err
	}
	return rp.Summary(stderr)
}
