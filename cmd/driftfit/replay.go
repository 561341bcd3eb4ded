package main

import (
	"context"
	"flag"
	"io"
	"os"
	"strings"
	"time"

	"driftfit/cmd/driftfit/internal/replay"
	"driftfit/cmd/driftfit/internal/report"
	"driftfit/ingest"
)

const replayHelp = `Usage: driftfit replay [flags] FILE.csv|-
       driftfit replay --config FILE [--calibrations FILE] [--events FILE] [--tickets FILE] [flags] FILE.csv|-

Feeds every row of a CSV file through the sliding fits in file order and
prints the final fits of every sensor, window and model, sorted by sensor,
window span and model.

With --config, the readings go through the service itself, as serve runs
it (classes, limits, peer groups, calibrations) on an embedded bus that
opens no port, whatever bus.servers says, and a scratch state file removed
afterwards (store.dir is not touched, no webhook is called). Replay writes
every alert event (as "driftfit alerts --format json" prints it) and
every ticket opening and closing (as "driftfit tickets --format json"
prints it, with "at" first: the reading or calibration time at which it
arose) as JSON lines in time order: to standard output, or to the files
--events and --tickets name. The windows are the configuration's, so
--window, --pane and --format do not apply. Calibrations (--calibrations,
CSV with the columns sensor, time, as_found, as_left) are sent as the
readings reach their time: a calibration of a sensor goes just before that
sensor's first row at or after its time, once the readings before it are
taken; the rest after the last row. A progress line comes every 5 s and
a summary at the end, both on standard error.

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
	var fl flowFlags
	fs.StringVar(&fl.config, "config", "", "configuration `FILE` (YAML): replay through the service, writing alert events and tickets")
	fs.StringVar(&fl.calibrations, "calibrations", "", "with --config: calibrations `FILE` (CSV: sensor,time,as_found,as_left)")
	fs.StringVar(&fl.events, "events", "", "with --config: write the alert events to `FILE` (default standard output)")
	fs.StringVar(&fl.tickets, "tickets", "", "with --config: write the ticket openings and closings to `FILE` (default standard output)")
	fs.StringVar(&fl.logLevel, "log-level", "error", "with --config: level of the service's log on standard error: debug, info, warn, error")
	pos, err := fs.parse(args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		return usageError("want one input file (or - for standard input), got %d arguments", len(pos))
	}
	var csvOpts ingest.CSVOptions
	if csvOpts.Location, err = time.LoadLocation(*zone); err != nil || *zone == "" || *zone == "Local" {
		return usageError("--time-zone %q: want an IANA zone name such as UTC or Europe/Berlin", *zone)
	}
	switch d := strings.ReplaceAll(*delimiter, `\t`, "\t"); {
	case len(d) != 1 || d == `"` || d == "\r" || d == "\n":
		return usageError("--delimiter %q: want one character other than a quote or line end, such as ';'", *delimiter)
	default:
		csvOpts.Comma = d[0]
	}
	if *columns != "" {
		for _, kv := range strings.Split(*columns, ",") {
			k, v, ok := strings.Cut(kv, "=")
			switch {
			case !ok || v == "":
				return usageError("--columns %q: want sensor=NAME,time=NAME,value=NAME", *columns)
			case k == "sensor":
				csvOpts.Sensor = v
			case k == "time":
				csvOpts.Time = v
			case k == "value":
				csvOpts.Value = v
			default:
				return usageError("--columns %q: %q is not one of sensor, time, value", *columns, k)
			}
		}
	}
	set := map[string]bool{}
	fs.Visit(func(f *flag.Flag) { set[f.Name] = true })
	if fl.config == "" {
		for _, name := range []string{"calibrations", "events", "tickets", "log-level"} {
			if set[name] {
				return usageError("--%s needs --config", name)
			}
		}
	} else {
		for _, name := range []string{"window", "pane", "format"} {
			if set[name] {
				return usageError("--%s does not apply with --config: the windows are the configuration's, the output JSON lines", name)
			}
		}
	}
	var out report.Writer
	o := replay.Options{Strict: *strict, Errors: stderr, CSV: csvOpts}
	if fl.config == "" {
		if out, err = report.New(*format, report.Fits, stdout, report.Options{}); err != nil {
			return usageError("--format %v", err)
		}
		if o.Windows, err = replay.ParseWindows(*windows, *pane); err != nil {
			return err
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
	if fl.config != "" {
		return runReplayFlow(ctx, in, fl, csvOpts, *strict, stdout, stderr)
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
