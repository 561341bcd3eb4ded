package configs

import (
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"time"
)

// Explain writes a readable summary of c for people checking a
// configuration: bus, store, the ticket webhook, windows, every class with
// its limits converted to canonical units (class unit per day, per day²),
// sensors with their own settings, and peer groups. Credentials are never
// printed: passwords in server and webhook URLs and the query values of the
// webhook URL are masked, and only the names of environment variables and
// credential files appear. Write errors are ignored (the caller's writer
// decides).
func (c *Config) Explain(w io.Writer) {
	p := func(format string, args ...any) { fmt.Fprintf(w, format, args...) }
	name := c.file
	if name == "" {
		name = "(in memory)"
	}
	p("configuration %s\n\n", name)

	b := &c.Bus
	p("bus\n")
	if len(b.Servers) == 0 {
		p("  servers:         embedded NATS server with JetStream under %s\n", c.Store.Dir)
		users := make([]string, len(b.Embedded.Users))
		for i, u := range b.Embedded.Users {
			what := u.Role
			if len(u.Sensors) > 0 {
				what += " of " + strings.Join(u.Sensors, ", ")
			}
			users[i] = fmt.Sprintf("%s (%s, password from $%s)", u.User, what, u.PasswordEnv)
		}
		if len(users) == 0 {
			p("  embedded:        listens on %s; no authentication\n", b.Embedded.Host)
		} else {
			p("  embedded:        listens on %s; users %s\n", b.Embedded.Host, strings.Join(users, ", "))
		}
		if b.MQTT.Listen != "" {
			p("  mqtt:            %s, topics %s/<sensor id with / for .>\n", b.MQTT.Listen, strings.ReplaceAll(b.SubjectPrefix, ".", "/"))
		}
	} else {
		red := make([]string, len(b.Servers))
		for i, s := range b.Servers {
			red[i] = redactServerURL(s)
		}
		p("  servers:         %s\n", strings.Join(red, ", "))
	}
	p("  readings:        %s.<sensor id> (mode %s", b.SubjectPrefix, b.Mode)
	if b.Mode == ModeStream {
		p(", stream %s", b.StreamName)
	}
	p(")\n")
	p("  rejected:        %s\n", b.RejectedSubject)
	p("  alerts:          %s.<sensor id>\n", b.AlertSubjectPrefix)
	p("  tickets:         %s\n", b.TicketSubject)
	p("  calibrations:    %s.<sensor id>\n", b.CalibrationSubjectPrefix)
	p("  max payload:     %d bytes; future skew %s\n", b.MaxPayloadBytes, FormatDuration(b.FutureSkew))
	var auth []string
	if b.User != "" {
		auth = append(auth, "user "+b.User)
	}
	if b.PasswordEnv != "" {
		auth = append(auth, "password from $"+b.PasswordEnv)
	}
	if b.TokenEnv != "" {
		auth = append(auth, "token from $"+b.TokenEnv)
	}
	if b.CredsFile != "" {
		auth = append(auth, "credentials file "+b.CredsFile)
	}
	if len(auth) == 0 {
		auth = append(auth, "none")
	}
	p("  auth:            %s\n", strings.Join(auth, ", "))
	if b.TLS != (TLS{}) {
		p("  tls:             ca %s, cert %s, key %s\n", orNone(b.TLS.CAFile), orNone(b.TLS.CertFile), orNone(b.TLS.KeyFile))
	}

	s := &c.Store
	p("\nstore\n")
	p("  dir:             %s\n", s.Dir)
	p("  commit:          every %s or %d readings, at most %d sensors a commit besides those with a decision\n",
		FormatDuration(s.CommitInterval), s.CommitReadings, s.CommitMaxSensors)
	if s.HistoryRetention == 0 {
		p("  fit history:     kept forever\n")
	} else {
		p("  fit history:     kept %s\n", FormatDuration(s.HistoryRetention))
	}
	if s.HistoryThinAfter > 0 {
		p("  thinned:         after %s, one record per %s for windows of shorter panes\n",
			FormatDuration(s.HistoryThinAfter), FormatDuration(s.HistoryThinTo))
	}
	wh := &c.Tickets.Webhook
	p("\ntickets\n")
	p("  bus:             %s\n", b.TicketSubject)
	if wh.URL == "" {
		p("  webhook:         none\n")
	} else {
		p("  webhook:         POST %s\n", redactWebhookURL(wh.URL))
		p("  attempts:        time out after %s; retries back off up to %s\n", FormatDuration(wh.Timeout), FormatDuration(wh.MaxBackoff))
		authz := "none"
		if wh.HeaderEnv != "" {
			authz = "from $" + wh.HeaderEnv
		}
		p("  authorization:   %s\n", authz)
	}
	p("\nmetrics on http://%s/metrics, pages on http://%s/\n", c.HTTP.Addr, c.HTTP.Addr)
	if c.HTTP.TokenEnv != "" {
		p("  pages ask for the bearer token in $%s\n", c.HTTP.TokenEnv)
	}
	p("\ndefault windows: %s\n", windowList(c.Defaults.Windows))

	p("\nclasses (%d)\n", len(c.Classes))
	for i := range c.Classes {
		explainClass(w, &c.Classes[i], "  ")
	}

	if len(c.Sensors) > 0 {
		p("\nsensors with their own settings (%d)\n", len(c.Sensors))
		for i := range c.Sensors {
			sn := &c.Sensors[i]
			cl, err := c.ClassFor(sn.ID)
			if err != nil {
				p("  %s: %v\n", sn.ID, err)
				continue
			}
			var parts []string
			how := "by pattern"
			if sn.Class != "" {
				how = "pinned"
			}
			parts = append(parts, fmt.Sprintf("class %s (%s)", cl.Name, how))
			if cl.HasAsLeft {
				parts = append(parts, fmt.Sprintf("as-left %s %s", fmtNum(cl.AsLeft), cl.Unit))
			}
			if cl.Group != "" {
				parts = append(parts, "group "+cl.Group)
			}
			var own []string
			for _, f := range overridable {
				if c.written(sensorPath(sn.ID) + "." + f) {
					own = append(own, f)
				}
			}
			if len(own) > 0 {
				parts = append(parts, "overrides "+strings.Join(own, ", "))
			}
			p("  %s: %s\n", sn.ID, strings.Join(parts, "; "))
			if len(own) > 0 {
				explainLimits(w, cl, "      ")
				p("      tolerance %s = %s %s\n", cl.Tolerance.Text, fmtNum(cl.Tolerance.Abs), cl.Unit)
			}
		}
	}

	p("\npeer groups (%d)\n", len(c.Groups))
	for _, g := range c.Groups {
		var joined []string
		for _, sn := range c.Sensors {
			if sn.Group == g.Name {
				joined = append(joined, sn.ID)
			}
		}
		p("  %s: %s", g.Name, strings.Join(g.Members, ", "))
		if len(joined) > 0 {
			if len(g.Members) > 0 {
				p(", ")
			}
			p("%s", strings.Join(joined, ", "))
		}
		p("\n")
	}
}

func orNone(s string) string {
	if s == "" {
		return "none"
	}
	return s
}

func windowList(ws []Window) string {
	parts := make([]string, len(ws))
	for i, w := range ws {
		parts[i] = fmt.Sprintf("%s of %s panes", FormatDuration(w.Span), FormatDuration(w.Pane))
	}
	return strings.Join(parts, ", ")
}

// fmtNum prints a number with six significant digits, enough to compare
// with a hand calculation, without exponent for ordinary magnitudes.
func fmtNum(f float64) string {
	return strconv.FormatFloat(f, 'g', 6, 64)
}

func explainClass(w io.Writer, cl *Class, in string) {
	fmt.Fprintf(w, "%s%s\n", in, cl.Name)
	fmt.Fprintf(w, "%s  match:       %s\n", in, strings.Join(cl.Match, ", "))
	explainSettings(w, cl, in+"  ")
}

// explainSettings writes the fields of a class that a sensor can override,
// with tolerance and limits in canonical units.
func explainSettings(w io.Writer, cl *Class, in string) {
	in = strings.TrimSuffix(in, "  ")
	p := func(format string, args ...any) { fmt.Fprintf(w, format, args...) }
	p("%s  unit, span:  %s, %s..%s %s (width %s)\n", in, cl.Unit, fmtNum(cl.Span.Lower), fmtNum(cl.Span.Upper), cl.Unit, fmtNum(cl.Span.Width()))
	p("%s  tolerance:   %s = ±%s %s around the as-left value\n", in, cl.Tolerance.Text, fmtNum(cl.Tolerance.Abs), cl.Unit)
	p("%s  windows:     %s\n", in, windowList(cl.Windows))
	p("%s  evidence:    trend %s, >= %d readings, >= %s of panes with data, %d pane closes in a row\n",
		in, cl.TrendModel, cl.MinReadings, fmtNum(cl.MinCoverage), cl.Debounce)
	cool := "none"
	if cl.Cooldown > 0 {
		cool = FormatDuration(cl.Cooldown)
	}
	p("%s  clears:      below %s × limit; cooldown %s\n", in, fmtNum(cl.ClearFraction), cool)
	p("%s  budget:      %s false tickets, %s false alerts per sensor-year\n", in,
		fmtNum(cl.AlarmBudget.FalseTicketsPerYear), fmtNum(cl.AlarmBudget.AlertsPerYear))
	if dt := explainDetectors(&cl.Detectors); dt != "" {
		p("%s  detectors:   %s\n", in, dt)
	}
	if cl.HasTicketKinds {
		kinds := "none"
		if len(cl.TicketKinds) > 0 {
			kinds = strings.Join(cl.TicketKinds, ", ")
		}
		p("%s  tickets on:  %s\n", in, kinds)
	}
	explainLimits(w, cl, in+"  ")
}

// explainDetectors lists the detectors that are on, with their settings
// as written (zeros take the alert package's defaults).
func explainDetectors(d *Detectors) string {
	var out []string
	if d.Step.On {
		out = append(out, fmt.Sprintf("step (k %s, h %s)", fmtNum(d.Step.K), fmtNum(d.Step.H)))
	}
	if d.Flatline.For > 0 {
		out = append(out, fmt.Sprintf("flatline over %s", FormatDuration(d.Flatline.For)))
	}
	if d.Spike.K > 0 {
		out = append(out, fmt.Sprintf("spike beyond %s robust SD", fmtNum(d.Spike.K)))
	}
	if d.Silent > 0 {
		out = append(out, fmt.Sprintf("silent after %s", FormatDuration(d.Silent)))
	}
	if d.OutOfSpan {
		out = append(out, "out of span")
	}
	return strings.Join(out, "; ")
}

func explainLimits(w io.Writer, cl *Class, in string) {
	l := &cl.Limits
	if !l.Slope.On() && !l.Curvature.On() && !l.DoublingTime.On() && !l.LeadTime.On() {
		fmt.Fprintf(w, "%slimits:      none\n", in)
		return
	}
	rate := func(name string, rl RateLimit, unit string) {
		if !rl.On() {
			return
		}
		var parts []string
		for _, lv := range []struct {
			n string
			t Threshold
		}{{"warning", rl.Warning}, {"critical", rl.Critical}} {
			if lv.t.Text != "" {
				parts = append(parts, fmt.Sprintf("%s %s = %s %s", lv.n, lv.t.Text, fmtNum(lv.t.Value), unit))
			}
		}
		fmt.Fprintf(w, "%s%-12s %s\n", in, name+":", strings.Join(parts, "; "))
	}
	rate("slope", l.Slope, cl.Unit+"/day")
	rate("curvature", l.Curvature, cl.Unit+"/day²")
	dur := func(name string, dl DurationLimit, extra func(time.Duration) string) {
		if !dl.On() {
			return
		}
		var parts []string
		for _, lv := range []struct {
			n string
			d time.Duration
		}{{"warning", dl.Warning}, {"critical", dl.Critical}} {
			if lv.d != 0 {
				parts = append(parts, fmt.Sprintf("%s %s%s", lv.n, FormatDuration(lv.d), extra(lv.d)))
			}
		}
		fmt.Fprintf(w, "%s%-12s %s\n", in, name+":", strings.Join(parts, "; "))
	}
	// Doubling time T corresponds to the exp fit's growth rate ln 2 / T.
	dur("doubling", l.DoublingTime, func(d time.Duration) string {
		return fmt.Sprintf(" (growth rate %s /day)", fmtNum(math.Ln2/(float64(d)/float64(Day))))
	})
	dur("lead time", l.LeadTime, func(time.Duration) string { return "" })
}

// ExplainSensor writes how the sensor id resolves: its class and why (pinned
// by the sensor's class field, or the class pattern it matches), the fields
// it overrides, its as-left value and peer group, and the merged settings
// with tolerance and limits in canonical units (class unit, unit per day,
// unit per day²). On error nothing is written and the error is ClassFor's:
// ErrNoClass, ErrAmbiguous, ErrUndefined, ErrOverlap or a validation error
// of the merged settings. Write errors are ignored.
func (c *Config) ExplainSensor(w io.Writer, id string) error {
	cl, err := c.ClassFor(id)
	if err != nil {
		return err
	}
	p := func(format string, args ...any) { fmt.Fprintf(w, format, args...) }
	how := "pinned by sensors[" + id + "].class"
	var sn *Sensor
	for i := range c.Sensors {
		if c.Sensors[i].ID == id {
			sn = &c.Sensors[i]
		}
	}
	if sn == nil || sn.Class == "" {
		for _, m := range cl.Match {
			if matchPattern(m, id) {
				how = fmt.Sprintf("matches pattern %q", m)
				break
			}
		}
	}
	p("sensor %s\n", id)
	p("  class:       %s (%s)\n", cl.Name, how)
	var own []string
	for _, f := range overridable {
		if c.written(sensorPath(id) + "." + f) {
			own = append(own, f)
		}
	}
	if len(own) > 0 {
		p("  overrides:   %s\n", strings.Join(own, ", "))
	}
	asLeft := "not set (the level of the first usable trend fit is taken)"
	if cl.HasAsLeft {
		asLeft = fmtNum(cl.AsLeft) + " " + cl.Unit
	}
	p("  as-left:     %s\n", asLeft)
	p("  peer group:  %s\n", orNone(cl.Group))
	explainSettings(w, cl, "  ")
	return nil
}
