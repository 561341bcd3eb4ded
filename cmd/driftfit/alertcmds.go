package main

import (
	"cmp"
	"context"
	"fmt"
	"io"
	"strconv"
	"strings"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/query"
	"driftfit/cmd/driftfit/internal/report"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/ingest/readapi"
)

// listFlags are the flags alerts and tickets share.
type listFlags struct {
	fs                   *flags
	src                  sourceFlags
	sensor, since, until *string
	format               *string
	open                 *bool
}

func newListFlags(name, help string, kind report.Kind) *listFlags {
	fs := newFlags(name, help)
	l := &listFlags{fs: fs, src: addSourceFlags(fs)}
	l.sensor = fs.String("sensor", "", "only sensors whose id matches `PATTERN` (* and ? wildcards)")
	l.since = fs.String("since", "", "from `TIME`: RFC 3339, a date, or a duration back from now such as 7d")
	l.until = fs.String("until", "", "before `TIME`, as for --since")
	l.format = fs.String("format", "table", "output format: "+strings.Join(report.Names(kind), ", ")+" (json: one object per line)")
	l.open = fs.Bool("open", false, "only what is still open (firing alerts, open tickets)")
	return l
}

// parse returns the source, the filter and the writer.
func (l *listFlags) parse(args []string, kind report.Kind, stdout io.Writer) (query.Source, query.Filter, report.Writer, error) {
	var f query.Filter
	pos, err := l.fs.parse(args)
	if err != nil {
		return nil, f, nil, err
	}
	if len(pos) != 0 {
		return nil, f, nil, usageError("unexpected arguments %q", pos)
	}
	now := time.Now()
	out, err := report.New(*l.format, kind, stdout, report.Options{Now: now})
	if err != nil {
		return nil, f, nil, usageError("--format %v", err)
	}
	if err := query.CheckPattern(*l.sensor); err != nil {
		return nil, f, nil, err
	}
	f.Sensor, f.Open = *l.sensor, *l.open
	if f.Since, err = query.ParseTime("since", *l.since, now); err != nil {
		return nil, f, nil, err
	}
	if f.Until, err = query.ParseTime("until", *l.until, now); err != nil {
		return nil, f, nil, err
	}
	dbPath, bus, _, err := l.src.resolve()
	if err != nil {
		return nil, f, nil, err
	}
	src, err := query.Open(dbPath, bus, "driftfit "+l.fs.Name())
	return src, f, out, err
}

func runAlerts(_ context.Context, args []string, _ io.Reader, stdout, _ io.Writer) error {
	l := newListFlags("alerts", "Usage: driftfit alerts [flags]\n\nLists alert events (raised, escalated, cleared, reset) in time order; with\n--open, the alerts still firing, each with the event that raised or last\nescalated it. "+alert.Caution, report.Events)
	src, f, out, err := l.parse(args, report.Events, stdout)
	if err != nil {
		return err
	}
	defer src.Close()
	evs, err := query.Events(src, f)
	if err != nil {
		return err
	}
	for i := range evs {
		if err := out.Event(&evs[i]); err != nil {
			return err
		}
	}
	return out.Close()
}

func runTickets(_ context.Context, args []string, _ io.Reader, stdout, _ io.Writer) error {
	l := newListFlags("tickets", "Usage: driftfit tickets [flags]\n\nLists recalibration tickets by due date, open and closed (--open: open\nonly); --since/--until select by the time a ticket was opened. An open\nticket whose due date has passed is listed as open, overdue (in JSON\n\"overdue\": true). "+alert.Caution, report.Tickets)
	src, f, out, err := l.parse(args, report.Tickets, stdout)
	if err != nil {
		return err
	}
	defer src.Close()
	tks, err := query.Tickets(src, f)
	if err != nil {
		return err
	}
	for i := range tks {
		if err := out.Ticket(&tks[i]); err != nil {
			return err
		}
	}
	return out.Close()
}

const calibratedHelp = `Usage: driftfit calibrated SENSOR --as-found V --as-left V [flags]

Records a calibration of SENSOR with the running service: closes its open
recalibration ticket, takes the as-left value as the new centre of the
tolerance band and restarts its alert evaluation from that moment (the fit
history is kept).`

func runCalibrated(ctx context.Context, args []string, _ io.Reader, stdout, _ io.Writer) error {
	fs := newFlags("calibrated", calibratedHelp)
	asFound := fs.String("as-found", "", "the reading before adjustment, against the standard (engineering unit)")
	asLeft := fs.String("as-left", "", "the reading after adjustment (engineering unit)")
	at := fs.String("at", "", "when the calibration was done: RFC 3339 or Unix seconds (default: now)")
	servers := fs.String("servers", "", "comma-separated NATS `URLs` of the running service (default: from --config, else "+readapi.DefaultURL+")")
	cfgPath := fs.String("config", "", "service config `FILE`: gives the bus connection (servers, credentials, TLS) and the calibration subject prefix")
	user := addUserFlag(fs)
	prefix := fs.String("prefix", "", "calibration subject prefix (default: bus.calibration_subject_prefix in --config, else driftfit.calibrations)")
	force := fs.Bool("force", false, "record it even if the service has never seen SENSOR (a mistyped id is refused without it)")
	pos, err := fs.parse(args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		return usageError("want one SENSOR id, got %d arguments", len(pos))
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
	var cfg *configs.Config
	if *cfgPath != "" {
		if cfg, err = configs.Load(*cfgPath); err != nil {
			return fmt.Errorf("--config: %w", err)
		}
		if *prefix == "" {
			*prefix = cfg.Bus.CalibrationSubjectPrefix
		}
	}
	*prefix = cmp.Or(*prefix, "driftfit.calibrations")
	bus, err := clientBus(cfg, *servers, *user, configs.RoleTechnician)
	if err != nil {
		return err
	}
	c, err := readapi.DialBus(bus, "driftfit calibrated")
	if err != nil {
		return err
	}
	defer c.Close()
	if err := c.Calibrate(ctx, *prefix, pos[0], ingest.CalibrationMsg{T: *at, AsFound: found, AsLeft: left, Force: *force}); err != nil {
		return err
	}
	fmt.Fprintf(stdout, "calibration of %s recorded (as-found %s, as-left %s)\n", report.EscapeID(pos[0]), report.Sig(found, 6), report.Sig(left, 6))
	return nil
}
