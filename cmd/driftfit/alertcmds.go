package main

import (
	"cmp"
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"slices"
	"strconv"
	"strings"
	"sync"
	"text/tabwriter"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/query"
	"driftfit/cmd/driftfit/internal/replay"
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

const calibratedHelp = `Usage: driftfit calibrated SENSOR --as-found V --as-left V [--at T] [flags]
       driftfit calibrated SENSOR --void N [--reason TEXT] [flags]
       driftfit calibrated SENSOR --correct N --as-found V --as-left V [--at T] [--reason TEXT] [flags]
       driftfit calibrated --from FILE [flags]

Records a calibration of SENSOR with the running service: closes its open
recalibration ticket, takes the as-left value as the new centre of the
tolerance band and restarts its fits from that moment (the fit history is
kept). The service numbers each sensor's calibrations 1, 2, ... and answers
once the change is stored; "driftfit calibrations" lists them.

--void N withdraws calibration N of SENSOR, which must be its latest in
force (void a later one first): the centre of the band and the cutoff for
older readings go back to what they were before it, and the ticket it
closed reopens, unless another ticket has opened since. The fits it
restarted stay restarted; readings refused because of it are not recovered
unless sent again. Its record stays, marked voided.

--correct N replaces calibration N, the latest in force, by the values
given, under a new number; the ticket it closed stays closed, by the
correction. Without --at its time is kept; a later time restarts the fits
from there, an earlier one moves the cutoff back. Its record stays, marked
corrected.

--from FILE sends each row of a CSV file with the columns
sensor,time,as_found,as_left (as replay --calibrations reads; other columns
are ignored), in time order, as a calibration, and reports every row:
recorded with its number, or refused with its line and the field and value
or the service's reason. Rows of one sensor go in order on one connection;
a refused row loses no other. The exit status is 1 if any row was refused.`

func runCalibrated(ctx context.Context, args []string, _ io.Reader, stdout, _ io.Writer) error {
	fs := newFlags("calibrated", calibratedHelp)
	asFound := fs.String("as-found", "", "the reading before adjustment, against the standard (engineering unit)")
	asLeft := fs.String("as-left", "", "the reading after adjustment (engineering unit)")
	at := fs.String("at", "", "when the calibration was done: RFC 3339, a date (midnight UTC) or Unix seconds (default: now; with --correct, the time recorded)")
	void := fs.String("void", "", "withdraw calibration `N` of SENSOR (its latest in force)")
	correct := fs.String("correct", "", "replace calibration `N` of SENSOR (its latest in force) by --as-found, --as-left and --at")
	reason := fs.String("reason", "", "why, with --void or --correct: stored with the record (at most 500 bytes)")
	from := fs.String("from", "", "send every row of the CSV `FILE` (sensor,time,as_found,as_left) as a calibration")
	parallel := fs.Int("parallel", 8, "with --from: connections sending rows at once, 1 to 64 (a sensor's rows share one)")
	servers := fs.String("servers", "", "comma-separated NATS `URLs` of the running service (default: from --config, else "+readapi.DefaultURL+")")
	cfgPath := fs.String("config", "", "service config `FILE`: gives the bus connection (servers, credentials, TLS) and the calibration subject prefix")
	user := addUserFlag(fs)
	prefix := fs.String("prefix", "", "calibration subject prefix (default: bus.calibration_subject_prefix in --config, else driftfit.calibrations)")
	force := fs.Bool("force", false, "record it even if the service has never seen SENSOR (a mistyped id is refused without it)")
	pos, err := fs.parse(args)
	if err != nil {
		return err
	}
	set := map[string]bool{}
	fs.Visit(func(f *flag.Flag) { set[f.Name] = true })
	var msg ingest.CalibrationMsg
	if err := calibratedArgs(pos, set, &msg, calibratedValues{*asFound, *asLeft, *at, *void, *correct, *reason}); err != nil {
		return err
	}
	msg.Force = *force
	if *parallel < 1 || *parallel > 64 {
		return usageError("--parallel %d: want 1 to 64", *parallel)
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
	dial := func() (*readapi.Client, error) { return readapi.DialBus(bus, "driftfit calibrated") }
	if *from != "" {
		return sendCalibrations(ctx, *from, *force, *parallel, dial, *prefix, stdout)
	}
	c, err := dial()
	if err != nil {
		return err
	}
	defer c.Close()
	id := pos[0]
	rec, err := c.Calibrate(ctx, *prefix, id, msg)
	if err != nil {
		return err
	}
	name := report.EscapeID(id)
	switch {
	case rec == nil: // a service that answers without the record
		fmt.Fprintf(stdout, "calibration of %s done\n", name)
	case msg.Void != 0:
		fmt.Fprintf(stdout, "calibration %d of %s voided%s\n", rec.Seq, name, ticketNote("reopened", rec.Reopened, "no ticket reopened"))
	case msg.Correct != 0:
		fmt.Fprintf(stdout, "calibration %d of %s corrected by calibration %d %s\n", rec.Corrects, name, rec.Seq, calValues(rec))
	default:
		fmt.Fprintf(stdout, "calibration %d of %s recorded %s%s\n", rec.Seq, name, calValues(rec), ticketNote("closed", rec.Closed, ""))
	}
	return nil
}

// calibratedValues are the flags of one calibration request as given.
type calibratedValues struct{ asFound, asLeft, at, void, correct, reason string }

// calibratedArgs checks the arguments of calibrated against each other
// and fills msg; every problem is a usage error naming the flag and the
// value.
func calibratedArgs(pos []string, set map[string]bool, msg *ingest.CalibrationMsg, v calibratedValues) error {
	if set["from"] {
		if len(pos) != 0 {
			return usageError("--from takes no SENSOR (the file names the sensors), got %q", pos)
		}
		for _, f := range []string{"as-found", "as-left", "at", "void", "correct", "reason"} {
			if set[f] {
				return usageError("--%s does not go with --from: the file holds the calibrations", f)
			}
		}
		return nil
	}
	if set["parallel"] {
		return usageError("--parallel goes with --from only")
	}
	if len(pos) != 1 {
		return usageError("want one SENSOR id, got %d arguments", len(pos))
	}
	var idErr *ingest.SensorIDError
	if errors.As(ingest.CheckSensorID(pos[0]), &idErr) {
		return usageError("SENSOR %s: %s", ingest.QuoteID(pos[0]), idErr.Problem)
	}
	number := func(flagName, s string) (uint64, error) {
		n, err := strconv.ParseUint(s, 10, 64)
		if err != nil || n == 0 {
			return 0, usageError("--%s %q: want the calibration's number, 1 or more (see driftfit calibrations)", flagName, s)
		}
		return n, nil
	}
	var err error
	switch {
	case set["void"] && set["correct"]:
		return usageError("--void %s and --correct %s: give one", v.void, v.correct)
	case set["void"]:
		if msg.Void, err = number("void", v.void); err != nil {
			return err
		}
		for _, f := range []string{"as-found", "as-left", "at", "force"} {
			if set[f] {
				return usageError("--%s does not go with --void: a void names the calibration only", f)
			}
		}
		msg.Reason = v.reason
		return nil
	case set["correct"]:
		if msg.Correct, err = number("correct", v.correct); err != nil {
			return err
		}
		if set["force"] {
			return usageError("--force does not go with --correct")
		}
		msg.Reason = v.reason
	case set["reason"]:
		return usageError("--reason %q: goes with --void or --correct only", v.reason)
	}
	for _, f := range []struct {
		name, text string
		dst        *float64
	}{{"as-found", v.asFound, &msg.AsFound}, {"as-left", v.asLeft, &msg.AsLeft}} {
		if !set[f.name] {
			return usageError("--%s: required (in the sensor's unit)", f.name)
		}
		x, err := strconv.ParseFloat(f.text, 64)
		if err != nil || math.IsInf(x, 0) || math.IsNaN(x) {
			return usageError("--%s %q: want a finite number", f.name, f.text)
		}
		*f.dst = x
	}
	if v.at != "" {
		msg.T = v.at
		if _, err := ingest.ParseTime([]byte(v.at)); err != nil {
			// A date alone is midnight UTC; a date too far ahead is then
			// refused by the service like any other time.
			d, derr := time.Parse(time.DateOnly, v.at)
			if derr != nil {
				return usageError("--at %q: %v (or give a date such as 2026-11-30)", v.at, err)
			}
			msg.T = d.Format(time.RFC3339)
		}
	}
	return nil
}

// calValues describes a record's values for a confirmation.
func calValues(r *ingest.CalibrationRecord) string {
	return fmt.Sprintf("(as-found %s, as-left %s, at %s)", num(r.AsFound), num(r.AsLeft), r.Time.UTC().Format(time.RFC3339Nano))
}

// ticketNote lists ticket ids after verb, or says none.
func ticketNote(verb string, ids []string, none string) string {
	if len(ids) == 0 {
		if none == "" {
			return ""
		}
		return "; " + none
	}
	esc := make([]string, len(ids))
	for i, id := range ids {
		esc[i] = report.EscapeID(id)
	}
	return "; ticket " + strings.Join(esc, ", ") + " " + verb
}

// num prints a value exactly: a confirmation must show what is stored.
func num(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }

// rowOutcome is what became of one row of a --from file.
type rowOutcome struct {
	line int
	ok   bool
	text string
}

// sendCalibrations sends the calibrations of the CSV file at path, rows
// of one sensor in time order on one of up to parallel connections, and
// writes one line per row by line number, then a summary.
func sendCalibrations(ctx context.Context, path string, force bool, parallel int, dial func() (*readapi.Client, error), prefix string, stdout io.Writer) error {
	f, err := os.Open(path)
	if err != nil {
		return err
	}
	cals, bad, err := replay.ReadCalibrations(f)
	f.Close()
	if err != nil {
		return fmt.Errorf("%s: %w", path, err)
	}
	var out []rowOutcome
	for _, e := range bad {
		var ce *replay.CalibrationError
		if !errors.As(e, &ce) {
			return fmt.Errorf("%s: %w", path, e)
		}
		text := fmt.Sprintf("line %d: refused: %v", ce.Line, ce.Err)
		if ce.Field != "" {
			text = fmt.Sprintf("line %d: refused: %s %q: %v", ce.Line, ce.Field, ce.Value, ce.Err)
		}
		out = append(out, rowOutcome{line: ce.Line, text: text})
	}
	shares := map[string]int{} // sensor → connection
	var lanes [][]replay.Calibration
	for _, c := range cals {
		k, ok := shares[c.Sensor]
		if !ok {
			k = len(shares) % parallel
			shares[c.Sensor] = k
		}
		for len(lanes) <= k {
			lanes = append(lanes, nil)
		}
		lanes[k] = append(lanes[k], c)
	}
	clients := make([]*readapi.Client, len(lanes))
	defer func() {
		for _, c := range clients {
			if c != nil {
				c.Close()
			}
		}
	}()
	for i := range clients {
		if clients[i], err = dial(); err != nil {
			return err
		}
	}
	results := make([][]rowOutcome, len(lanes))
	var wg sync.WaitGroup
	for i, lane := range lanes {
		wg.Go(func() {
			for _, c := range lane {
				results[i] = append(results[i], sendRow(ctx, clients[i], prefix, c, force))
			}
		})
	}
	wg.Wait()
	for _, r := range results {
		out = append(out, r...)
	}
	slices.SortFunc(out, func(a, b rowOutcome) int { return cmp.Compare(a.line, b.line) })
	refused := 0
	for _, r := range out {
		if !r.ok {
			refused++
		}
		fmt.Fprintln(stdout, r.text)
	}
	fmt.Fprintf(stdout, "%s: %d rows: %d recorded, %d refused\n", path, len(out), len(out)-refused, refused)
	if refused > 0 {
		return fmt.Errorf("%s: %d of %d rows refused", path, refused, len(out))
	}
	return nil
}

// sendRow sends one row and describes the outcome.
func sendRow(ctx context.Context, c *readapi.Client, prefix string, cal replay.Calibration, force bool) rowOutcome {
	name := report.EscapeID(cal.Sensor)
	if err := ctx.Err(); err != nil {
		return rowOutcome{line: cal.Line, text: fmt.Sprintf("line %d: %s: not sent: %v", cal.Line, name, err)}
	}
	msg := ingest.CalibrationMsg{T: cal.Time.Format(time.RFC3339Nano), AsFound: cal.AsFound, AsLeft: cal.AsLeft, Force: force}
	rec, err := c.Calibrate(ctx, prefix, cal.Sensor, msg)
	var se *readapi.ServiceError
	switch {
	case errors.As(err, &se):
		return rowOutcome{line: cal.Line, text: fmt.Sprintf("line %d: %s: refused by the service: %s", cal.Line, name, se.Msg)}
	case err != nil:
		return rowOutcome{line: cal.Line, text: fmt.Sprintf("line %d: %s: refused: %v", cal.Line, name, err)}
	case rec == nil:
		return rowOutcome{line: cal.Line, ok: true, text: fmt.Sprintf("line %d: %s: recorded", cal.Line, name)}
	}
	return rowOutcome{line: cal.Line, ok: true, text: fmt.Sprintf("line %d: calibration %d of %s recorded %s%s", cal.Line, rec.Seq, name, calValues(rec), ticketNote("closed", rec.Closed, ""))}
}

const calibrationsHelp = `Usage: driftfit calibrations [flags]

Lists the calibrations the service recorded, by sensor and number, voided
and corrected ones too, marked, with when and why; the one in force of each
sensor (its latest not voided or corrected, whose as-left is the centre of
its tolerance band) says so. Reads the state file, or the running service
over NATS when it holds the file, as history does. --format csv writes the
columns sensor,time,as_found,as_left among others, as calibrated --from and
replay --calibrations read them: with --in-force, a fleet's last as-left
values.`

func runCalibrations(_ context.Context, args []string, _ io.Reader, stdout, _ io.Writer) error {
	fs := newFlags("calibrations", calibrationsHelp)
	src := addSourceFlags(fs)
	sensor := fs.String("sensor", "", "only sensors whose id matches `PATTERN` (* and ? wildcards)")
	since := fs.String("since", "", "calibrations done from `TIME`: RFC 3339, a date, or a duration back from now such as 30d")
	until := fs.String("until", "", "calibrations done before `TIME`, as for --since")
	inForce := fs.Bool("in-force", false, "only the calibration in force of each sensor")
	format := fs.String("format", "table", "output format: table, csv, json (one object per line)")
	pos, err := fs.parse(args)
	if err != nil {
		return err
	}
	if len(pos) != 0 {
		return usageError("unexpected arguments %q", pos)
	}
	switch *format {
	case "table", "csv", "json":
	default:
		return usageError("--format %q: want table, csv or json", *format)
	}
	if err := query.CheckPattern(*sensor); err != nil {
		return err
	}
	f := query.Filter{Sensor: *sensor, Open: *inForce}
	now := time.Now()
	if f.Since, err = query.ParseTime("since", *since, now); err != nil {
		return err
	}
	if f.Until, err = query.ParseTime("until", *until, now); err != nil {
		return err
	}
	dbPath, bus, _, err := src.resolve()
	if err != nil {
		return err
	}
	s, err := query.Open(dbPath, bus, "driftfit calibrations")
	if err != nil {
		return err
	}
	defer s.Close()
	cals, walkErr := query.Calibrations(s, f)
	if err := writeCalibrations(stdout, *format, cals); err != nil {
		return err
	}
	return walkErr
}

// writeCalibrations writes the records in format.
func writeCalibrations(w io.Writer, format string, cals []query.Calibration) error {
	status := func(c *query.Calibration) string {
		switch {
		case c.Damaged:
			return "damaged"
		case c.InForce:
			return "in force"
		}
		return c.Status
	}
	switch format {
	case "json":
		enc := json.NewEncoder(w)
		for i := range cals {
			if err := enc.Encode(&cals[i]); err != nil {
				return err
			}
		}
		return nil
	case "csv":
		cw := csv.NewWriter(w)
		_ = cw.Write([]string{"sensor", "seq", "time", "as_found", "as_left", "status", "in_force", "recorded", "changed", "reason", "corrects", "corrected_by", "closed", "reopened"})
		for i := range cals {
			c := &cals[i]
			row := []string{c.Sensor, strconv.FormatUint(c.Seq, 10), "", "", "", status(c), strconv.FormatBool(c.InForce), "", "", c.Reason, "", "", strings.Join(c.Closed, " "), strings.Join(c.Reopened, " ")}
			if !c.Damaged {
				row[2], row[3], row[4], row[7] = c.Time.UTC().Format(time.RFC3339Nano), num(c.AsFound), num(c.AsLeft), c.Recorded.UTC().Format(time.RFC3339Nano)
			}
			if !c.Changed.IsZero() {
				row[8] = c.Changed.UTC().Format(time.RFC3339Nano)
			}
			if c.Corrects != 0 {
				row[10] = strconv.FormatUint(c.Corrects, 10)
			}
			if c.CorrectedBy != 0 {
				row[11] = strconv.FormatUint(c.CorrectedBy, 10)
			}
			_ = cw.Write(row)
		}
		cw.Flush()
		return cw.Error()
	}
	if len(cals) == 0 {
		_, err := fmt.Fprintln(w, "no calibrations recorded (that match)")
		return err
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "sensor\tno.\ttime\tas-found\tas-left\tstatus\trecorded\tnote")
	for i := range cals {
		c := &cals[i]
		if c.Damaged {
			fmt.Fprintf(tw, "%s\t%d\t\t\t\tdamaged\t\tthe stored record does not read back\n", report.EscapeID(c.Sensor), c.Seq)
			continue
		}
		var note []string
		switch c.Status {
		case ingest.CalibrationVoided:
			note = append(note, "voided "+c.Changed.UTC().Format(time.RFC3339))
		case ingest.CalibrationCorrected:
			note = append(note, fmt.Sprintf("corrected %s by %d", c.Changed.UTC().Format(time.RFC3339), c.CorrectedBy))
		}
		if c.Reason != "" {
			note = append(note, strconv.Quote(c.Reason))
		}
		if c.Corrects != 0 {
			note = append(note, fmt.Sprintf("corrects %d", c.Corrects))
		}
		if n := ticketNote("closed", c.Closed, ""); n != "" {
			note = append(note, n[2:])
		}
		if n := ticketNote("reopened", c.Reopened, ""); n != "" {
			note = append(note, n[2:])
		}
		fmt.Fprintf(tw, "%s\t%d\t%s\t%s\t%s\t%s\t%s\t%s\n", report.EscapeID(c.Sensor), c.Seq, c.Time.UTC().Format(time.RFC3339),
			num(c.AsFound), num(c.AsLeft), status(c), c.Recorded.UTC().Format(time.RFC3339), strings.Join(note, "; "))
	}
	return tw.Flush()
}
