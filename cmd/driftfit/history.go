package main

import (
	"bytes"
	"cmp"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"net"
	"path/filepath"
	"slices"
	"strings"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/query"
	"driftfit/cmd/driftfit/internal/report"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/ingest/readapi"
	"driftfit/rolling"
)

// defaultDBPath returns the database file the reading commands open when
// no flag names one: the file serve writes (dbFile) in the default data
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

// historyRecent is the default time range of history: the 30 days up to
// the sensor's newest record, a month of drift at a glance.
const historyRecent = 30 * configs.Day

const historyHelp = `Usage: driftfit history SENSOR [flags]

Prints the fit history of one sensor from the driftfit database: one fit
record per window each time the window's newest pane closed, in time order
(records of several windows at the same time in order of span, then pane).
Each record holds the three fits (line, parabola, exp) of its window.

Formats:
  table  aligned columns for people, one row per record and model, numbers
         rounded to the digits their 95% interval leaves meaningful, with
         the sensor's unit (from --unit, the class in --config, else the
         unit its tickets, or else its alerts, in the file name)
  csv    RFC 4180 (CRLF line ends) with a header, one row per record and
         model; c0 is the level (exp: ln of the level), c1_per_day the rate
         per day, c2_per_day2 the curvature per day² (parabola only); "se"
         columns are standard errors, "ci95" columns 95% interval ends; a
         field that does not apply is empty
  json   one object per line per record and model, the same fields as
         "driftfit replay --format json", so the two compare line for line;
         the record time is "last"
  png, svg  the picture --plot draws, on standard output

Times (--since, --until) are RFC 3339 (2026-03-01T12:00:00Z), a date
(2026-03-01, midnight UTC), or a duration back from now (30d, 12h, 2w).
--since is inclusive, --until exclusive. With neither, history shows the
30 days up to the sensor's newest record, and says so when older records
are left out.

--plot draws each selected window's fits over time, one column per
window on one time axis that starts at the first record: the level (of
the class's trend model) inside the tolerance band around the as-left
value, the drift rate per day with the slope limits, and, when the class
judges them, the parabola's curvature and the exponential fit's growth
rate with the doubling-time limits; each estimate with its 95% confidence
band. A strip below marks alerts (raised, cleared), tickets (opened, due,
closed) and calibrations, which also rule across the panels. The as-left
value holds from one calibration to the next: the calibration's own, else
the class's as_left (before the first calibration), else the one a ticket
recorded, else the level of the first fit that passed the evidence gates.
Without --config the tolerance comes from the newest ticket and the limits
from the levels stored alerts were raised at; --model picks the panels.
Value axes span the 2nd to 98th percentiles of the records with a usual
95% interval (so a filling window or one wild reading does not flatten
the rest), widened to the band and limits. With --plot, nothing is
printed on standard output unless --format is given.

The database is opened read-only. bbolt locks the file with flock: a
read-only open takes a shared lock, the writer (driftfit serve) an
exclusive one for as long as it runs, and the two conflict. So when the
file is in use (history waits up to 1s for the lock), history asks the
running service instead, over NATS (subject driftfit.api.history), at
--servers: by default bus.servers in --config, with the same credentials
and TLS as serve, else the embedded server's address (bus.embedded.host,
port 4222) as a reader of bus.embedded.users (--user picks one). Before
it reads, history checks that the service answering holds this very file,
and stops naming both files if not. The service
reads the same file and sends the records back unchanged. Several history
runs may read one file at once.
When nothing matches, nothing is printed on standard output and a note on
standard error names the windows and times the sensor has.`

func runHistory(ctx context.Context, args []string, _ io.Reader, stdout, stderr io.Writer) error {
	return history(ctx, time.Now(), args, stdout, stderr)
}

// sourceFlags are the flags that find the state file or the service.
type sourceFlags struct {
	db, data, cfg, servers, user *string
}

func addSourceFlags(fs *flags) sourceFlags {
	return sourceFlags{
		db:      fs.String("db", "", "database `FILE` (default: "+dbFile+" in the data directory, "+defaultDBPath()+" unless --data or --config say otherwise)"),
		data:    fs.String("data", "", "the service's data `DIR` (as for driftfit serve --data): read "+dbFile+" in it"),
		cfg:     fs.String("config", "", "service config `FILE`: gives store.dir, the bus connection (servers, credentials, TLS) and the sensors' units"),
		servers: fs.String("servers", "", "comma-separated NATS `URLs` of the running service to ask when the file is in use (default: bus.servers in --config, else the embedded server's address, "+readapi.DefaultURL+")"),
		user:    addUserFlag(fs),
	}
}

func addUserFlag(fs *flags) *string {
	return fs.String("user", "", "connect to the embedded server as `NAME`, one of bus.embedded.users in --config, with the password in its password_env variable (default: the first with the role the command needs)")
}

// resolve returns the file and service connection the flags name, and
// the configuration if --config was given.
func (s sourceFlags) resolve() (dbPath string, bus ingest.BusOptions, cfg *configs.Config, err error) {
	dbPath = *s.db
	if dbPath == "" && *s.data != "" {
		dbPath = filepath.Join(*s.data, dbFile)
	}
	if *s.cfg != "" {
		if cfg, err = configs.Load(*s.cfg); err != nil {
			return "", bus, nil, fmt.Errorf("--config: %w", err)
		}
		if dbPath == "" {
			dbPath = filepath.Join(cfg.Store.Dir, dbFile)
		}
	}
	bus, err = clientBus(cfg, *s.servers, *s.user, configs.RoleReader)
	return cmp.Or(dbPath, defaultDBPath()), bus, cfg, err
}

// clientBus is how a command reaches the running service: serve's own
// connection options from cfg (servers, user and password variable,
// token, credentials file, TLS), or, for the embedded server, its
// address on bus.embedded.host and a user of bus.embedded.users (user,
// else the first with role). servers, if not empty, replaces the
// addresses. cfg may be nil.
func clientBus(cfg *configs.Config, servers, user, role string) (ingest.BusOptions, error) {
	var bus ingest.BusOptions
	if cfg != nil {
		bus = busOptions(cfg, 0, nil, nil)
		if len(cfg.Bus.Servers) == 0 {
			host := cfg.Bus.Embedded.Host
			if ip := net.ParseIP(host); ip != nil && ip.IsUnspecified() {
				host = "127.0.0.1"
			}
			bus.Servers = []string{"nats://" + net.JoinHostPort(host, "4222")}
			var found *configs.BusUser
			for i, u := range cfg.Bus.Embedded.Users {
				if user == u.User || user == "" && u.Role == role {
					found = &cfg.Bus.Embedded.Users[i]
					break
				}
			}
			switch {
			case found != nil:
				bus.User, bus.PasswordEnv = found.User, found.PasswordEnv
			case user != "":
				return bus, usageError("--user %q: not among bus.embedded.users in the configuration", user)
			}
		}
	} else if user != "" {
		return bus, usageError("--user needs --config, which names the user's password variable")
	}
	if servers != "" {
		bus.Servers = strings.Split(servers, ",")
	}
	if len(bus.Servers) == 0 {
		bus.Servers = []string{readapi.DefaultURL}
	}
	return bus, nil
}

// classUnit returns the class unit of a sensor under cfg ("" when no
// class matches): a sensor without a class still has fits worth showing.
func classUnit(cfg *configs.Config) func(id string) string {
	return func(id string) string {
		if cl, err := cfg.ClassFor(id); err == nil {
			return cl.Unit
		}
		return ""
	}
}

// history runs the history command with now as the reference for
// relative times.
func history(ctx context.Context, now time.Time, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("history", historyHelp)
	src := addSourceFlags(fs)
	window := fs.String("window", "", "only the windows of this span, or this span and pane (`SPAN[/PANE]`, e.g. 30d or 30d/1d); default every window")
	since := fs.String("since", "", "first record `TIME` (inclusive): RFC 3339, a date, or a duration back from now such as 30d")
	until := fs.String("until", "", "end `TIME` (exclusive), as for --since")
	models := fs.String("model", "line,parabola,exp", "comma-separated `MODELS` to print")
	format := fs.String("format", "table", "output format: "+strings.Join(report.Names(report.History), ", "))
	plotPath := fs.String("plot", "", "draw the fits with tolerance band, limits, alerts, tickets and calibrations into `FILE` (.png or .svg)")
	unit := fs.String("unit", "", "engineering `UNIT` of the sensor's values (overrides --config and the file)")
	pos, err := fs.parse(args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		return usageError("want one SENSOR id, got %d arguments", len(pos))
	}
	q := query.HistoryQuery{Sensor: pos[0], Recent: historyRecent}
	set := map[string]bool{}
	fs.Visit(func(f *flag.Flag) { set[f.Name] = true })
	if err := report.Check(*format, report.History); err != nil {
		return usageError("--format %v", err)
	}
	plotFormat := strings.TrimPrefix(strings.ToLower(filepath.Ext(*plotPath)), ".")
	if *plotPath != "" && !slices.Contains([]string{"png", "svg"}, plotFormat) {
		return usageError("--plot %q: want a file name ending in .png or .svg", *plotPath)
	}
	for _, name := range strings.Split(*models, ",") {
		m, err := rolling.ParseModel(strings.TrimSpace(name))
		if err != nil {
			return usageError("--model %q: %q is not a model (want line, parabola or exp)", *models, name)
		}
		if !slices.Contains(q.Models, m) {
			q.Models = append(q.Models, m)
		}
	}
	if *window != "" {
		if q.Span, q.Spec, err = query.ParseWindow(*window); err != nil {
			return err
		}
	}
	if q.Since, err = query.ParseTime("since", *since, now); err != nil {
		return err
	}
	if q.Until, err = query.ParseTime("until", *until, now); err != nil {
		return err
	}
	if !q.Since.IsZero() && !q.Until.IsZero() && !q.Since.Before(q.Until) {
		return usageError("--since %s is not before --until %s", q.Since.UTC().Format(time.RFC3339), q.Until.UTC().Format(time.RFC3339))
	}
	dbPath, bus, cfg, err := src.resolve()
	if err != nil {
		return err
	}
	db, err := query.Open(dbPath, bus, "driftfit history")
	if err != nil {
		return err
	}
	defer db.Close()

	if *unit == "" && cfg != nil {
		*unit = classUnit(cfg)(q.Sensor)
	}
	if *unit == "" {
		if *unit, err = query.StoredUnit(db, q.Sensor); err != nil {
			return err
		}
	}
	opts := report.Options{Unit: func(string) string { return *unit }}
	if *plotPath != "" {
		// The class's rule, when --config names one: its tolerance,
		// as-left, limits and models. A class without limits still
		// gives its tolerance and as-left.
		var rule *alert.Rule
		if cfg != nil {
			r, _, err := ruleFor(cfg, q.Sensor)
			if err != nil {
				return fmt.Errorf("--config: %w", err)
			}
			if r.Class != "" {
				rule = &r
			}
		}
		var models []rolling.Model
		if set["model"] {
			models = q.Models
		}
		opts.Annotate = func(sensor string, from, to time.Time) (*report.Annotations, error) {
			return query.Annotate(db, sensor, rule, models, from, to)
		}
	}
	var outs []report.Writer
	if *plotPath == "" || set["format"] {
		out, _ := report.New(*format, report.History, stdout, opts)
		outs = append(outs, out)
	}
	// The picture is drawn into memory and written at the end, so that a
	// failed run leaves no file.
	var pic bytes.Buffer
	if *plotPath != "" {
		p, _ := report.New(plotFormat, report.History, &pic, opts)
		outs = append(outs, p)
	}
	matched, err := query.History(ctx, db, q, outs, stderr)
	for _, out := range outs {
		err = errors.Join(err, out.Close())
	}
	if matched == 0 && errors.Is(err, report.ErrNothingToDraw) {
		return errors.New("nothing to plot")
	}
	if err != nil || *plotPath == "" {
		return err
	}
	if err := report.WriteFileAtomic(*plotPath, func(w io.Writer) error { _, err := pic.WriteTo(w); return err }); err != nil {
		return fmt.Errorf("--plot %s: %w", *plotPath, err)
	}
	fmt.Fprintf(stderr, "driftfit history: wrote %s: %d records of %s\n", *plotPath, matched, report.EscapeID(q.Sensor))
	return nil
}
