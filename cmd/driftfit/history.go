package main

import (
	"context"
	"encoding/csv"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"time"

	"driftfit/configs"
	"driftfit/rolling"
	"driftfit/store"
)

// defaultDBPath returns the database file history reads when no flag
// names one: the file serve writes (dbFile) in the default data
// directory of an empty config, as serve run without --config uses.
func defaultDBPath() string {
	cfg, err := configs.Parse("(defaults)", []byte("{}"))
	if err != nil {
		// The empty config is valid by construction; keep the command
		// usable if that ever breaks, with the documented default.
		return filepath.Join("data", dbFile)
	}
	return filepath.Join(cfg.Store.Dir, dbFile)
}

// historyLockWait bounds the wait for the file lock. A read-only open
// takes a shared flock, a running service holds an exclusive one for as
// long as it has the file open, so waiting longer would not help; a
// second is enough to ride out another reader's open or a service that
// is just exiting.
const historyLockWait = time.Second

const historyHelp = `Usage: driftfit history SENSOR [flags]

Prints the fit history of one sensor from the driftfit database: one fit
record per window each time the window's newest pane closed, in time order
(records of several windows at the same time in order of span, then pane).
Each record holds the three fits (line, parabola, exp) of its window.

Formats:
  table  aligned columns for people, one row per record and model
  csv    RFC 4180 (CRLF line ends) with a header, one row per record and
         model; c0 is the level (exp: ln of the level), c1_per_day the rate
         per day, c2_per_day2 the curvature per day² (parabola only); "se"
         columns are standard errors, "ci95" columns 95% interval ends; a
         field that does not apply is empty
  json   one object per line per record and model, the same fields as
         "driftfit replay --format json", so the two compare line for line;
         the record time is "last"

Times (--since, --until) are RFC 3339 (2026-03-01T12:00:00Z), a date
(2026-03-01, midnight UTC), or a duration back from now (30d, 12h, 2w).
--since is inclusive, --until exclusive.

--plot draws the line fit of each selected window over time: the level
(c0) above and the drift rate per day (c1) below, each with its 95%
confidence band, one column per window. With --plot, nothing is printed on
standard output unless --format is given.

The database is opened read-only. bbolt locks the file with flock: a
read-only open takes a shared lock, the writer (driftfit serve) an
exclusive one for as long as it runs, and the two conflict. So when the
file is in use (history waits up to 1s for the lock), history asks the
running service instead, over NATS (subject driftfit.api.history), at
--servers: by default the first of bus.servers in --config, else the
embedded server's default address nats://127.0.0.1:4222. The service
reads the same file and sends the records back unchanged. Several history
runs may read one file at once.
When nothing matches, nothing is printed on standard output and a note on
standard error names the windows and times the sensor has.

Flags:`

func runHistory(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) error {
	return history(ctx, time.Now(), args, stdout, stderr)
}

// historyQuery is what the flags of history select.
type historyQuery struct {
	sensor       string
	dbPath       string
	span         time.Duration      // 0: every window
	spec         rolling.WindowSpec // zero unless a pane was given too
	since, until time.Time          // zero: open end
	models       []rolling.Model
	format       string // table, csv or json; "" with --plot alone
	plotPath     string
	unit         string // "" when unknown
	servers      string // NATS URL of a running service, asked when the file is locked
}

// defaultAPIURL is where history looks for a running service by default:
// the embedded NATS server's default address.
const defaultAPIURL = "nats://127.0.0.1:4222"

// historySource is where history reads from: the file itself
// (*store.DB) or a running service that holds it (remoteHistory).
type historySource interface {
	History(sensor string, window rolling.WindowSpec, since, until time.Time, fn func(store.HistoryRecord) error) error
	HistorySensors(fn func(id string) error) error
	Path() string
	Close() error
}

// history runs the history command with now as the reference for
// relative times.
func history(ctx context.Context, now time.Time, args []string, stdout, stderr io.Writer) error {
	q, err := parseHistoryArgs(now, args, stderr)
	if err != nil {
		return err
	}
	db, err := openHistoryDB(q.dbPath, q.servers)
	if err != nil {
		return err
	}
	defer db.Close()

	// The writer starts with the first record, so that a sensor without
	// history prints no header before its error.
	var out historyWriter
	var series []plotSeries
	matched := 0
	err = db.History(q.sensor, q.spec, q.since, q.until, func(r store.HistoryRecord) error {
		sol := &r.Solution
		if q.span != 0 && sol.Window.Span != q.span {
			return nil
		}
		if matched&0x3ff == 0 && ctx.Err() != nil {
			return ctx.Err()
		}
		matched++
		if out == nil {
			var err error
			if out, err = newHistoryWriter(stdout, q.format); err != nil {
				return err
			}
		}
		label := historyWindowLabel(sol.Window)
		for _, m := range q.models {
			if err := out.add(q.sensor, label, sol, m); err != nil {
				return err
			}
		}
		if q.plotPath != "" {
			series = addPlotPoint(series, label, sol)
		}
		return nil
	})
	if err != nil {
		return err
	}
	if out != nil {
		if err := out.flush(); err != nil {
			return err
		}
	}
	if matched == 0 {
		if err := explainNoRecords(db, q, stderr); err != nil {
			return err
		}
	}
	if q.plotPath == "" {
		return nil
	}
	if matched == 0 {
		return errors.New("nothing to plot")
	}
	if err := writeHistoryPlot(q.plotPath, q.sensor, q.unit, series); err != nil {
		return fmt.Errorf("--plot %s: %w", q.plotPath, err)
	}
	fmt.Fprintf(stderr, "driftfit history: wrote %s: %d records of %s\n", q.plotPath, matched, q.sensor)
	return nil
}

// parseHistoryArgs parses the flags and the sensor id, which may come
// before, between or after the flags.
func parseHistoryArgs(now time.Time, args []string, stderr io.Writer) (historyQuery, error) {
	var q historyQuery
	fs := flag.NewFlagSet("history", flag.ContinueOnError)
	fs.SetOutput(stderr)
	dbPath := fs.String("db", "", "database `FILE` (default: "+dbFile+" in the data directory, "+defaultDBPath()+" unless --data or --config say otherwise)")
	dataDir := fs.String("data", "", "the service's data `DIR` (as for driftfit serve --data): read "+dbFile+" in it")
	cfgPath := fs.String("config", "", "service config `FILE`: gives the sensor's unit for --plot and the data directory (store.dir)")
	window := fs.String("window", "", "only the windows of this span, or this span and pane (`SPAN[/PANE]`, e.g. 30d or 30d/1d); default every window")
	since := fs.String("since", "", "first record `TIME` (inclusive): RFC 3339, a date, or a duration back from now such as 30d")
	until := fs.String("until", "", "end `TIME` (exclusive), as for --since")
	models := fs.String("model", "line,parabola,exp", "comma-separated `MODELS` to print")
	format := fs.String("format", "table", "output format: table, csv or json")
	plotPath := fs.String("plot", "", "draw level and drift rate with their 95% bands into `FILE` (.png or .svg)")
	unit := fs.String("unit", "", "engineering `UNIT` for the plot's axis labels (overrides --config)")
	servers := fs.String("servers", "", "NATS `URL` of the running service to ask when the file is in use (default: bus.servers in --config, else "+defaultAPIURL+")")
	fs.Usage = func() {
		fmt.Fprintln(stderr, historyHelp)
		fs.PrintDefaults()
	}
	pos, err := parseInterleaved(fs, args)
	if err != nil {
		return q, err
	}
	if len(pos) != 1 {
		fs.Usage()
		return q, usageError("want one SENSOR id, got %d arguments", len(pos))
	}
	q.sensor = pos[0]
	set := map[string]bool{}
	fs.Visit(func(f *flag.Flag) { set[f.Name] = true })

	switch *format {
	case "table", "csv", "json":
		q.format = *format
	default:
		return q, usageError("--format %q: want table, csv or json", *format)
	}
	if *plotPath != "" {
		switch strings.ToLower(filepath.Ext(*plotPath)) {
		case ".png", ".svg":
		default:
			return q, usageError("--plot %q: want a file name ending in .png or .svg", *plotPath)
		}
		q.plotPath = *plotPath
		if !set["format"] {
			q.format = ""
		}
	}
	for _, name := range strings.Split(*models, ",") {
		m, err := rolling.ParseModel(strings.TrimSpace(name))
		if err != nil {
			return q, usageError("--model %q: %q is not a model (want line, parabola or exp)", *models, name)
		}
		if !slices.Contains(q.models, m) {
			q.models = append(q.models, m)
		}
	}
	if *window != "" {
		if q.span, q.spec, err = parseHistoryWindow(*window); err != nil {
			return q, err
		}
	}
	if q.since, err = parseHistoryTime("since", *since, now); err != nil {
		return q, err
	}
	if q.until, err = parseHistoryTime("until", *until, now); err != nil {
		return q, err
	}
	if !q.since.IsZero() && !q.until.IsZero() && !q.since.Before(q.until) {
		return q, usageError("--since %s is not before --until %s", q.since.UTC().Format(time.RFC3339), q.until.UTC().Format(time.RFC3339))
	}

	q.dbPath, q.unit, q.servers = *dbPath, *unit, *servers
	if q.dbPath == "" && *dataDir != "" {
		q.dbPath = filepath.Join(*dataDir, dbFile)
	}
	if *cfgPath != "" {
		cfg, err := configs.Load(*cfgPath)
		if err != nil {
			return q, fmt.Errorf("--config: %w", err)
		}
		if q.dbPath == "" {
			q.dbPath = filepath.Join(cfg.Store.Dir, dbFile)
		}
		if q.servers == "" && len(cfg.Bus.Servers) > 0 {
			q.servers = cfg.Bus.Servers[0]
		}
		if q.unit == "" {
			// A sensor no class matches keeps the generic label: the
			// history is still worth drawing.
			if cl, err := cfg.ClassFor(q.sensor); err == nil {
				q.unit = cl.Unit
			}
		}
	}
	if q.dbPath == "" {
		q.dbPath = defaultDBPath()
	}
	if q.servers == "" {
		q.servers = defaultAPIURL
	}
	return q, nil
}

// parseHistoryWindow parses "SPAN" or "SPAN/PANE". With a pane the spec
// is returned too; the span alone selects every window of that span.
func parseHistoryWindow(s string) (time.Duration, rolling.WindowSpec, error) {
	spanText, paneText, hasPane := strings.Cut(s, "/")
	span, err := configs.ParseDuration(spanText)
	if err != nil {
		return 0, rolling.WindowSpec{}, usageError("--window %q: %v", s, err)
	}
	if span <= 0 {
		return 0, rolling.WindowSpec{}, usageError("--window %q: span must be positive", s)
	}
	if !hasPane {
		return span, rolling.WindowSpec{}, nil
	}
	pane, err := configs.ParseDuration(paneText)
	if err != nil {
		return 0, rolling.WindowSpec{}, usageError("--window %q: pane: %v", s, err)
	}
	spec := rolling.WindowSpec{Span: span, Pane: pane}
	if _, err := rolling.NewSensor(spec); err != nil {
		return 0, rolling.WindowSpec{}, usageError("--window %q: %v", s, err)
	}
	return span, spec, nil
}

// parseHistoryTime parses a --since or --until value: RFC 3339, a date
// (midnight UTC) or a positive duration back from now. Empty gives the
// zero time (open end).
func parseHistoryTime(flagName, s string, now time.Time) (time.Time, error) {
	if s == "" {
		return time.Time{}, nil
	}
	if t, err := time.Parse(time.RFC3339Nano, s); err == nil {
		return t, nil
	}
	if t, err := time.Parse(time.DateOnly, s); err == nil {
		return t, nil
	}
	d, err := configs.ParseDuration(s)
	if err != nil {
		return time.Time{}, usageError("--%s %q: want RFC 3339 (2026-03-01T12:00:00Z), a date (2026-03-01) or a duration back from now (30d)", flagName, s)
	}
	if d <= 0 {
		return time.Time{}, usageError("--%s %q: a duration back from now must be positive", flagName, s)
	}
	return now.Add(-d), nil
}

// historyWindowLabel writes a window as SPAN/PANE in the duration syntax
// of the config file and the --window flags ("30d/1d", "1d/1h").
func historyWindowLabel(ws rolling.WindowSpec) string {
	return configs.FormatDuration(ws.Span) + "/" + configs.FormatDuration(ws.Pane)
}

// openHistoryDB opens the database read-only; when a running service
// holds it, it asks that service at servers instead. The common failures
// come back as advice.
func openHistoryDB(path, servers string) (historySource, error) {
	if _, err := os.Stat(path); err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return nil, fmt.Errorf("no database file at %s (give --db FILE, --data DIR or --config FILE)", path)
		}
		return nil, err
	}
	db, err := store.Open(path, store.Options{ReadOnly: true, LockTimeout: historyLockWait})
	if errors.Is(err, store.ErrLocked) {
		remote, rerr := dialRemoteHistory(servers)
		if rerr == nil {
			return remote, nil
		}
		return nil, fmt.Errorf("%s is in use by a running driftfit serve (or another process writing it), "+
			"and no service answers at %s (%v): give --servers with the service's NATS address, "+
			"or stop the service and retry: %w", path, servers, rerr, err)
	}
	if err != nil {
		return nil, err
	}
	return db, nil
}

// explainNoRecords says on w why nothing matched: an error when the
// sensor has no history at all, a note naming what there is otherwise.
func explainNoRecords(db historySource, q historyQuery, w io.Writer) error {
	var windows []rolling.WindowSpec
	var first, last time.Time
	err := db.History(q.sensor, rolling.WindowSpec{}, time.Time{}, time.Time{}, func(r store.HistoryRecord) error {
		if !slices.Contains(windows, r.Solution.Window) {
			windows = append(windows, r.Solution.Window)
		}
		if first.IsZero() {
			first = r.Solution.Last
		}
		last = r.Solution.Last
		return nil
	})
	if err != nil {
		return err
	}
	if len(windows) == 0 {
		return noSensorError(db, q.sensor)
	}
	slices.SortFunc(windows, func(a, b rolling.WindowSpec) int {
		if a.Span != b.Span {
			return int(a.Span - b.Span)
		}
		return int(a.Pane - b.Pane)
	})
	labels := make([]string, len(windows))
	for i, ws := range windows {
		labels[i] = historyWindowLabel(ws)
	}
	fmt.Fprintf(w, "driftfit history: no records of %s match; it has records of windows %s from %s to %s\n",
		q.sensor, strings.Join(labels, ", "), first.UTC().Format(time.RFC3339), last.UTC().Format(time.RFC3339))
	return nil
}

// maxSuggestions bounds the sensor ids offered when the one asked for
// has no history.
const maxSuggestions = 5

// noSensorError reports a sensor without history, offering the ids
// that share the longest prefix with it (a typo usually sits late in an
// id such as plant.unit.tag).
func noSensorError(db historySource, sensor string) error {
	type cand struct {
		id     string
		common int
	}
	var cands []cand
	total := 0
	err := db.HistorySensors(func(id string) error {
		total++
		n := 0
		for n < len(id) && n < len(sensor) && id[n] == sensor[n] {
			n++
		}
		cands = append(cands, cand{id, n})
		return nil
	})
	if err != nil {
		return err
	}
	msg := fmt.Sprintf("sensor %q has no fit history in %s", sensor, db.Path())
	if total == 0 {
		return errors.New(msg + " (the file holds no fit history at all)")
	}
	slices.SortStableFunc(cands, func(a, b cand) int { return b.common - a.common })
	var ids []string
	for _, c := range cands[:min(maxSuggestions, len(cands))] {
		ids = append(ids, c.id)
	}
	return fmt.Errorf("%s; %d sensors have history, such as %s", msg, total, strings.Join(ids, ", "))
}

// historyWriter prints fit records in one of the text formats.
type historyWriter interface {
	add(sensor, window string, sol *rolling.Solution, m rolling.Model) error
	flush() error
}

func newHistoryWriter(w io.Writer, format string) (historyWriter, error) {
	switch format {
	case "table":
		return historyTable{newFitTable(w)}, nil
	case "csv":
		return newHistoryCSV(w)
	case "json":
		return historyJSON{w}, nil
	case "":
		return discardHistory{}, nil
	}
	return nil, usageError("--format %q: want table, csv or json", format)
}

type historyTable struct{ t *fitTable }

func (h historyTable) add(sensor, window string, sol *rolling.Solution, m rolling.Model) error {
	h.t.add(sensor, window, sol.Fit(m))
	return nil
}

func (h historyTable) flush() error { return h.t.flush() }

type historyJSON struct{ w io.Writer }

func (h historyJSON) add(sensor, window string, sol *rolling.Solution, m rolling.Model) error {
	return writeFitJSON(h.w, newFitJSON(sensor, window, sol.Fit(m)))
}

func (historyJSON) flush() error { return nil }

type discardHistory struct{}

func (discardHistory) add(string, string, *rolling.Solution, rolling.Model) error { return nil }
func (discardHistory) flush() error                                               { return nil }

// historyCSVHeader names the CSV columns. Rates are per day and
// curvatures per day², as the fits compute them; time columns are RFC
// 3339 in UTC. "time" is the record's time, the newest reading in the
// window when its pane closed.
var historyCSVHeader = []string{
	"time", "sensor", "window", "model", "status", "n", "excluded", "first",
	"c0", "c0_se", "c0_ci95_low", "c0_ci95_high",
	"c1_per_day", "c1_se_per_day", "c1_ci95_low_per_day", "c1_ci95_high_per_day",
	"c2_per_day2", "c2_se_per_day2", "c2_ci95_low_per_day2", "c2_ci95_high_per_day2",
	"resid_sd", "r2", "df", "cond", "pos_def", "doubling_days",
}

type historyCSV struct {
	cw  *csv.Writer
	row []string
}

func newHistoryCSV(w io.Writer) (*historyCSV, error) {
	h := &historyCSV{cw: csv.NewWriter(w), row: make([]string, len(historyCSVHeader))}
	// RFC 4180 section 2, rule 1: records end with CRLF.
	h.cw.UseCRLF = true
	if err := h.cw.Write(historyCSVHeader); err != nil {
		return nil, err
	}
	return h, nil
}

func (h *historyCSV) add(sensor, window string, sol *rolling.Solution, m rolling.Model) error {
	// Take the fields from the JSON form, so the two formats cannot
	// disagree about what a fit shows (which fields a failed or constant
	// fit has, the doubling time).
	j := newFitJSON(sensor, window, sol.Fit(m))
	g := func(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }
	r := h.row
	clear(r)
	r[0] = sol.Last.UTC().Format(time.RFC3339Nano)
	r[1], r[2], r[3], r[4] = j.Sensor, j.Window, j.Model, j.Status
	r[5], r[6], r[7] = strconv.Itoa(j.N), strconv.Itoa(j.Excluded), j.First
	for i := range j.Coef {
		c := 8 + 4*i
		r[c], r[c+1], r[c+2], r[c+3] = g(j.Coef[i]), g(j.SE[i]), g(j.CI95[i][0]), g(j.CI95[i][1])
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
	return h.cw.Write(r)
}

func (h *historyCSV) flush() error {
	h.cw.Flush()
	return h.cw.Error()
}
