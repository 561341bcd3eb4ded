package main

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"path"
	"path/filepath"
	"slices"
	"strconv"
	"text/tabwriter"
	"time"

	"github.com/nats-io/nats.go"

	"driftfit/alert"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/store"
)

// alertSource is where alerts and tickets read from: the state file, or a
// running service that holds it.
type alertSource interface {
	Events(since, until time.Time, fn func(at time.Time, data []byte) error) error
	Tickets(fn func(id string, data []byte) error) error
	Close() error
}

// listFlags are the flags alerts and tickets share.
type listFlags struct {
	fs                     *flag.FlagSet
	db, data, cfg, servers *string
	sensor, since, until   *string
	format                 *string
	open                   *bool
}

func newListFlags(name, help string, stderr io.Writer) *listFlags {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	l := &listFlags{fs: fs}
	l.db = fs.String("db", "", "state `FILE` (default: "+dbFile+" in the data directory)")
	l.data = fs.String("data", "", "the service's data `DIR`")
	l.cfg = fs.String("config", "", "service config `FILE` (gives store.dir and bus.servers)")
	l.servers = fs.String("servers", "", "NATS `URL` of the running service, asked when the file is in use (default "+defaultAPIURL+")")
	l.sensor = fs.String("sensor", "", "only sensors whose id matches `PATTERN` (* and ? wildcards)")
	l.since = fs.String("since", "", "from `TIME`: RFC 3339, a date, or a duration back from now such as 7d")
	l.until = fs.String("until", "", "before `TIME`, as for --since")
	l.format = fs.String("format", "table", "table, csv or json (one object per line)")
	l.open = fs.Bool("open", false, "only what is still open (firing alerts, open tickets)")
	fs.Usage = func() {
		fmt.Fprintln(stderr, help+"\n\nFlags:")
		fs.PrintDefaults()
	}
	return l
}

// parse returns the source, time range and sensor filter.
func (l *listFlags) parse(args []string) (alertSource, time.Time, time.Time, error) {
	var zero time.Time
	if err := l.fs.Parse(args); err != nil {
		return nil, zero, zero, err
	}
	if l.fs.NArg() != 0 {
		return nil, zero, zero, usageError("unexpected arguments %q", l.fs.Args())
	}
	switch *l.format {
	case "table", "csv", "json":
	default:
		return nil, zero, zero, usageError("--format %q: want table, csv or json", *l.format)
	}
	if _, err := path.Match(*l.sensor, ""); err != nil {
		return nil, zero, zero, usageError("--sensor %q: %v", *l.sensor, err)
	}
	now := time.Now()
	since, err := parseHistoryTime("since", *l.since, now)
	if err != nil {
		return nil, zero, zero, err
	}
	until, err := parseHistoryTime("until", *l.until, now)
	if err != nil {
		return nil, zero, zero, err
	}
	dbPath, servers := *l.db, *l.servers
	if dbPath == "" && *l.data != "" {
		dbPath = filepath.Join(*l.data, dbFile)
	}
	if *l.cfg != "" {
		cfg, err := configs.Load(*l.cfg)
		if err != nil {
			return nil, zero, zero, fmt.Errorf("--config: %w", err)
		}
		if dbPath == "" {
			dbPath = filepath.Join(cfg.Store.Dir, dbFile)
		}
		if servers == "" && len(cfg.Bus.Servers) > 0 {
			servers = cfg.Bus.Servers[0]
		}
	}
	if dbPath == "" {
		dbPath = defaultDBPath()
	}
	if servers == "" {
		servers = defaultAPIURL
	}
	src, err := openHistoryDB(dbPath, servers)
	if err != nil {
		return nil, zero, zero, err
	}
	return src.(alertSource), since, until, nil
}

func (l *listFlags) match(id string) bool {
	if *l.sensor == "" {
		return true
	}
	ok, _ := path.Match(*l.sensor, id)
	return ok
}

func runAlerts(_ context.Context, args []string, _ io.Reader, stdout, stderr io.Writer) error {
	l := newListFlags("alerts", "Usage: driftfit alerts [flags]\n\nLists alert events (raised, escalated, cleared, reset) in time order; with\n--open, the alerts still firing, each with the event that raised or last\nescalated it. "+alert.Caution, stderr)
	src, since, until, err := l.parse(args)
	if err != nil {
		return err
	}
	defer src.Close()
	var evs []alert.Event
	type key struct{ sensor, window, kind string }
	firing := map[key]int{}
	err = src.Events(since, until, func(_ time.Time, data []byte) error {
		var ev alert.Event
		if err := json.Unmarshal(data, &ev); err != nil {
			return fmt.Errorf("stored event: %w", err)
		}
		if !l.match(ev.Sensor) {
			return nil
		}
		k := key{ev.Sensor, ev.Window, ev.Kind.String()}
		if *l.open {
			switch ev.Type {
			case alert.Raised, alert.Escalated:
				firing[k] = len(evs)
			default:
				delete(firing, k)
			}
		}
		evs = append(evs, ev)
		return nil
	})
	if err != nil {
		return err
	}
	if *l.open {
		var keep []alert.Event
		for i, ev := range evs {
			if j, ok := firing[key{ev.Sensor, ev.Window, ev.Kind.String()}]; ok && j == i {
				keep = append(keep, ev)
			}
		}
		evs = keep
	}
	switch *l.format {
	case "json":
		for _, ev := range evs {
			if err := writeJSONLine(stdout, ev); err != nil {
				return err
			}
		}
		return nil
	case "csv":
		w := csv.NewWriter(stdout)
		_ = w.Write([]string{"at", "type", "sensor", "class", "window", "kind", "severity", "value", "ci95_low", "ci95_high", "limit", "unit", "n"})
		for _, ev := range evs {
			_ = w.Write([]string{ev.At.UTC().Format(time.RFC3339), ev.Type.String(), ev.Sensor, ev.Class, ev.Window, ev.Kind.String(),
				ev.Severity.String(), fmtG(ev.Value), fmtG(ev.CI[0]), fmtG(ev.CI[1]), fmtG(ev.Limit), ev.Unit, strconv.Itoa(ev.N)})
		}
		w.Flush()
		return w.Error()
	}
	tw := tabwriter.NewWriter(stdout, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "AT\tTYPE\tSENSOR\tWINDOW\tKIND\tSEVERITY\tVALUE ±95%\tLIMIT\tUNIT\tN")
	for _, ev := range evs {
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%s\t%s [%s, %s]\t%s\t%s\t%d\n", ev.At.UTC().Format("2006-01-02 15:04"), ev.Type, ev.Sensor, ev.Window,
			ev.Kind, ev.Severity, fmtG(ev.Value), fmtG(ev.CI[0]), fmtG(ev.CI[1]), fmtG(ev.Limit), ev.Unit, ev.N)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	if len(evs) > 0 {
		fmt.Fprintln(stdout, "\n"+alert.Caution)
	}
	return nil
}

func runTickets(_ context.Context, args []string, _ io.Reader, stdout, stderr io.Writer) error {
	l := newListFlags("tickets", "Usage: driftfit tickets [flags]\n\nLists recalibration tickets by due date, open and closed (--open: open\nonly); --since/--until select by the time a ticket was opened. "+alert.Caution, stderr)
	src, since, until, err := l.parse(args)
	if err != nil {
		return err
	}
	defer src.Close()
	var tks []alert.Ticket
	err = src.Tickets(func(_ string, data []byte) error {
		var tk alert.Ticket
		if err := json.Unmarshal(data, &tk); err != nil {
			return fmt.Errorf("stored ticket: %w", err)
		}
		switch {
		case !l.match(tk.Sensor), *l.open && tk.Calibration != nil,
			!since.IsZero() && tk.Opened.Before(since), !until.IsZero() && !tk.Opened.Before(until):
			return nil
		}
		tks = append(tks, tk)
		return nil
	})
	if err != nil {
		return err
	}
	slices.SortFunc(tks, func(a, b alert.Ticket) int { return a.Due.Compare(b.Due) })
	switch *l.format {
	case "json":
		for _, tk := range tks {
			if err := writeJSONLine(stdout, tk); err != nil {
				return err
			}
		}
		return nil
	case "csv":
		w := csv.NewWriter(stdout)
		_ = w.Write([]string{"id", "sensor", "class", "opened", "due", "reason", "severity", "window", "as_left", "tolerance", "as_found_deviation", "as_found_low", "as_found_high", "unit", "status"})
		for _, tk := range tks {
			_ = w.Write([]string{tk.ID, tk.Sensor, tk.Class, tk.Opened.UTC().Format(time.RFC3339), tk.Due.UTC().Format(time.RFC3339),
				tk.Reason.String(), tk.Severity.String(), tk.Window, fmtG(tk.AsLeft), fmtG(tk.Tolerance),
				fmtG(tk.AsFound.Deviation), fmtG(tk.AsFound.Low), fmtG(tk.AsFound.High), tk.Unit, ticketStatus(&tk)})
		}
		w.Flush()
		return w.Error()
	}
	tw := tabwriter.NewWriter(stdout, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "DUE\tSENSOR\tREASON\tSEVERITY\tWINDOW\tAS-FOUND DEVIATION ±95%\tTOLERANCE\tUNIT\tSTATUS")
	for _, tk := range tks {
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%s [%s, %s]\t±%s\t%s\t%s\n", tk.Due.UTC().Format("2006-01-02"), tk.Sensor, tk.Reason, tk.Severity, tk.Window,
			fmtG(tk.AsFound.Deviation), fmtG(tk.AsFound.Low), fmtG(tk.AsFound.High), fmtG(tk.Tolerance), tk.Unit, ticketStatus(&tk))
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	if len(tks) > 0 {
		fmt.Fprintln(stdout, "\n"+alert.Caution)
	}
	return nil
}

func ticketStatus(tk *alert.Ticket) string {
	if tk.Calibration == nil {
		return "open"
	}
	return "closed " + tk.Calibration.Time.UTC().Format("2006-01-02")
}

func fmtG(v float64) string { return strconv.FormatFloat(v, 'g', 5, 64) }

func writeJSONLine(w io.Writer, v any) error {
	b, err := json.Marshal(v)
	if err != nil {
		return err
	}
	_, err = w.Write(append(b, '\n'))
	return err
}

func runCalibrated(ctx context.Context, args []string, _ io.Reader, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("calibrated", flag.ContinueOnError)
	fs.SetOutput(stderr)
	asFound := fs.String("as-found", "", "the reading before adjustment, against the standard (engineering unit)")
	asLeft := fs.String("as-left", "", "the reading after adjustment (engineering unit)")
	at := fs.String("at", "", "when the calibration was done: RFC 3339 or Unix seconds (default: now)")
	servers := fs.String("servers", defaultAPIURL, "NATS `URL` of the running service")
	prefix := fs.String("prefix", "driftfit.calibrations", "calibration subject prefix (bus.calibration_subject_prefix)")
	force := fs.Bool("force", false, "record it even if the service has never seen SENSOR (a mistyped id is refused without it)")
	fs.Usage = func() {
		fmt.Fprintln(stderr, "Usage: driftfit calibrated SENSOR --as-found V --as-left V [flags]\n\nRecords a calibration of SENSOR with the running service: closes its open\nrecalibration ticket, takes the as-left value as the new centre of the\ntolerance band and restarts its alert evaluation from that moment (the fit\nhistory is kept).\n\nFlags:")
		fs.PrintDefaults()
	}
	pos, err := parseInterleaved(fs, args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		fs.Usage()
		return usageError("want one SENSOR id")
	}
	found, err := strconv.ParseFloat(*asFound, 64)
	if err != nil {
		return usageError("--as-found %q: want a number", *asFound)
	}
	left, err := strconv.ParseFloat(*asLeft, 64)
	if err != nil {
		return usageError("--as-left %q: want a number", *asLeft)
	}
	if *at != "" {
		if _, err := ingest.ParseTime([]byte(*at)); err != nil {
			return usageError("--at %q: %v", *at, err)
		}
	}
	nc, err := nats.Connect(*servers, nats.Name("driftfit calibrated"), nats.Timeout(2*time.Second))
	if err != nil {
		return fmt.Errorf("connect to the service at %s: %w", *servers, err)
	}
	defer nc.Close()
	payload, err := json.Marshal(ingest.CalibrationMsg{T: *at, AsFound: found, AsLeft: left, Force: *force})
	if err != nil {
		return err
	}
	msg, err := nc.RequestWithContext(ctxTimeout(ctx, apiTimeout), *prefix+"."+pos[0], payload)
	if err != nil {
		return fmt.Errorf("no answer from the service at %s: %w", *servers, err)
	}
	var ans struct {
		OK    bool   `json:"ok"`
		Error string `json:"error"`
	}
	if err := json.Unmarshal(msg.Data, &ans); err != nil {
		return err
	}
	if !ans.OK {
		return errors.New("service: " + ans.Error)
	}
	fmt.Fprintf(stdout, "calibration of %s recorded (as-found %s, as-left %s)\n", pos[0], fmtG(found), fmtG(left))
	return nil
}

func ctxTimeout(ctx context.Context, d time.Duration) context.Context {
	c, cancel := context.WithTimeout(ctx, d)
	context.AfterFunc(c, cancel)
	return c
}

var (
	_ alertSource = (*store.DB)(nil)
	_ alertSource = (*remoteHistory)(nil)
)
