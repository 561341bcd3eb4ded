package configs

import (
	"cmp"
	"errors"
	"fmt"
	"math"
	"net"
	"net/url"
	"slices"
	"strconv"
	"strings"
	"time"
	"unicode"
)

func classPath(i int) string { return fmt.Sprintf("classes[%d]", i) }
func groupPath(i int) string { return fmt.Sprintf("groups[%d]", i) }

// validator collects problems. Problems under a path that already failed to
// decode are dropped, so one typo yields one message rather than a cascade.
type validator struct {
	c    *Config
	bad  map[string]bool
	errs []error
	seen map[string]bool
	// note is appended to problems found while checking a sensor's merged
	// class, so a class field that only fails with the sensor's overrides
	// says which sensor.
	note string
}

// parent returns the path one level up: "a.b[2]" -> "a.b", "a.b" -> "a",
// "sensors[x.y].unit" -> "sensors[x.y]". Dots inside brackets (sensor ids)
// are not separators.
func parent(path string) string {
	depth := 0
	for i := len(path) - 1; i >= 0; i-- {
		switch path[i] {
		case ']':
			if depth == 0 && i == len(path)-1 {
				if j := strings.LastIndexByte(path[:i], '['); j >= 0 {
					return path[:j]
				}
			}
			depth++
		case '[':
			depth--
		case '.':
			if depth == 0 {
				return path[:i]
			}
		}
	}
	return ""
}

func (v *validator) add(path, value string, sentinel error, format string, args ...any) {
	for p := path; p != ""; p = parent(p) {
		if v.bad[p] {
			return
		}
	}
	fe := &FieldError{File: v.c.file, Field: path, Value: value, Err: sentinel, Detail: fmt.Sprintf(format, args...)}
	// Place the error at the field, or at the nearest written ancestor
	// when the field itself is missing.
	for p := path; p != ""; p = parent(p) {
		if pos, ok := v.c.pos[p]; ok {
			fe.Line, fe.Column = pos.line, pos.column
			break
		}
	}
	// A class problem found again through a sensor's merged settings is
	// the class's own: report it once, without naming the sensor.
	if v.seen[fe.Error()] {
		return
	}
	if v.note != "" && !strings.HasPrefix(path, "sensors[") {
		fe.Detail += " " + v.note
	}
	key := fe.Error()
	if v.seen[key] {
		return
	}
	v.seen[key] = true
	v.errs = append(v.errs, fe)
}

// addErr places an error returned by a value parser at path.
func (v *validator) addErr(path string, err error) {
	var fe *FieldError
	if errors.As(err, &fe) {
		v.add(path, fe.Value, fe.Err, "%s", fe.Detail)
		return
	}
	v.add(path, "", ErrRange, "%v", err)
}

// Validate checks every field and cross-field rule, fills the canonical
// forms of tolerances and limits (Tolerance.Abs, Threshold.Value), and
// returns all problems joined with errors.Join, each a *FieldError. It
// expects defaults to be applied already (Parse and Load do both).
func (c *Config) Validate() error {
	return c.validate(nil)
}

func (c *Config) validate(bad map[string]bool) error {
	v := &validator{c: c, bad: bad, seen: map[string]bool{}}
	v.bus()
	v.store()
	v.http()
	v.windows("defaults.windows", c.Defaults.Windows)
	v.classes()
	v.sensors()
	v.groups()
	v.tickets()
	return errors.Join(v.errs...)
}

// sortErrors orders problems by line and column so a reader fixes the file top down.
func sortErrors(errs []error) {
	pos := func(err error) (int, int) {
		var fe *FieldError
		if errors.As(err, &fe) {
			return fe.Line, fe.Column
		}
		return 0, 0
	}
	slices.SortStableFunc(errs, func(a, b error) int {
		la, ca := pos(a)
		lb, cb := pos(b)
		return cmp.Or(cmp.Compare(la, lb), cmp.Compare(ca, cb))
	})
}

func (v *validator) bus() {
	b := &v.c.Bus
	for i, s := range b.Servers {
		p := fmt.Sprintf("bus.servers[%d]", i)
		u, err := url.Parse(s)
		switch {
		case err != nil:
			v.add(p, redactURL(s), ErrRange, "not a URL")
			continue
		case u.User != nil:
			if _, has := u.User.Password(); has {
				v.add(p, redactURL(s), ErrCredential, "remove the password from the URL and name its environment variable in bus.password_env")
			} else {
				// nats.go sends a user name alone in a URL as a token, in
				// place of bus.user and its password.
				v.add(p, redactServerURL(s), ErrCredential, "NATS takes a name alone before @ as a token and sends it instead of bus.user: remove it and set bus.user (or the token's variable in bus.token_env)")
			}
		}
		switch u.Scheme {
		case "nats", "tls", "ws", "wss":
		default:
			v.add(p, redactURL(s), ErrRange, "scheme must be nats, tls, ws or wss")
		}
		if u.Host == "" {
			v.add(p, redactURL(s), ErrRange, "missing host")
		}
	}
	v.embedded()
	if len(b.Servers) == 0 {
		for _, f := range []struct{ path, val string }{
			{"bus.user", b.User}, {"bus.password_env", b.PasswordEnv}, {"bus.token_env", b.TokenEnv},
			{"bus.creds_file", b.CredsFile}, {"bus.tls.ca_file", b.TLS.CAFile},
			{"bus.tls.cert_file", b.TLS.CertFile}, {"bus.tls.key_file", b.TLS.KeyFile},
		} {
			if f.val != "" {
				v.add(f.path, f.val, ErrConflict, "has no effect with the embedded server; set bus.servers or remove it")
			}
		}
	}
	v.subject("bus.subject_prefix", b.SubjectPrefix)
	v.subject("bus.rejected_subject", b.RejectedSubject)
	if strings.HasPrefix(b.RejectedSubject, b.SubjectPrefix+".") {
		v.add("bus.rejected_subject", b.RejectedSubject, ErrConflict, "lies under bus.subject_prefix %q, whose stream would keep dead letters with the readings; choose a subject outside it", b.SubjectPrefix)
	}
	v.subject("bus.alert_subject_prefix", b.AlertSubjectPrefix)
	v.subject("bus.ticket_subject", b.TicketSubject)
	v.subject("bus.calibration_subject_prefix", b.CalibrationSubjectPrefix)
	if b.Mode != ModeStream && b.Mode != ModeDirect {
		v.add("bus.mode", b.Mode.String(), ErrRange, "must be stream or direct")
	}
	if b.StreamName == "" || strings.ContainsAny(b.StreamName, ".*>/\\") || strings.IndexFunc(b.StreamName, unicode.IsSpace) >= 0 {
		v.add("bus.stream_name", b.StreamName, ErrRange, "must be non-empty without white space or any of . * > / \\ (JetStream stream name rules)")
	}
	if b.MaxPayloadBytes <= 0 || b.MaxPayloadBytes > maxMaxPayloadBytes {
		v.add("bus.max_payload_bytes", strconv.Itoa(b.MaxPayloadBytes), ErrRange, "must be between 1 and %d (64 MiB)", maxMaxPayloadBytes)
	}
	if b.FutureSkew < 0 {
		v.add("bus.future_skew", FormatDuration(b.FutureSkew), ErrRange, "must be >= 0")
	}
	for _, f := range []struct {
		path string
		n    int
	}{{"bus.stream_max_bytes", b.StreamMaxBytes}, {"bus.rejected_max_bytes", b.RejectedMaxBytes}, {"bus.max_sensors", b.MaxSensors}} {
		if f.n <= 0 {
			v.add(f.path, strconv.Itoa(f.n), ErrRange, "must be > 0")
		}
	}
	if b.StreamMaxAge < 0 {
		v.add("bus.stream_max_age", FormatDuration(b.StreamMaxAge), ErrRange, "must be >= 0 (0: no age limit)")
	}
	if b.RejectedMaxAge <= 0 {
		v.add("bus.rejected_max_age", FormatDuration(b.RejectedMaxAge), ErrRange, "must be > 0")
	}
	v.envName("bus.password_env", b.PasswordEnv)
	v.envName("bus.token_env", b.TokenEnv)
	if b.PasswordEnv != "" && b.User == "" {
		v.add("bus.password_env", b.PasswordEnv, ErrConflict, "a password needs bus.user")
	}
	if b.TokenEnv != "" && (b.User != "" || b.CredsFile != "") {
		v.add("bus.token_env", b.TokenEnv, ErrConflict, "use a token, a user or a credentials file, not several")
	}
	if b.User != "" && b.CredsFile != "" {
		v.add("bus.creds_file", b.CredsFile, ErrConflict, "use a user or a credentials file, not both")
	}
	if (b.TLS.CertFile == "") != (b.TLS.KeyFile == "") {
		v.add("bus.tls", "", ErrConflict, "cert_file and key_file go together")
	}
}

// embedded checks the embedded server's users and listeners. Passwords
// are never read here: only the names of their variables are checked.
func (v *validator) embedded() {
	b := &v.c.Bus
	e := &b.Embedded
	if len(b.Servers) > 0 {
		for _, p := range []string{"bus.embedded.host", "bus.embedded.users", "bus.mqtt.listen"} {
			if v.c.written(p) {
				v.add(p, "", ErrConflict, "has no effect with bus.servers: configure users and MQTT on that NATS deployment")
			}
		}
		return
	}
	if e.Host == "" || strings.ContainsAny(e.Host, " \t/@") {
		v.add("bus.embedded.host", e.Host, ErrRange, "must be a host name or IP address to listen on, such as 127.0.0.1")
	}
	seen := map[string]int{}
	for i, u := range e.Users {
		p := fmt.Sprintf("bus.embedded.users[%d]", i)
		switch {
		case u.User == "":
			v.add(p+".user", "", ErrMissing, "name the user")
		case strings.IndexFunc(u.User, unicode.IsSpace) >= 0 || strings.ContainsAny(u.User, ":@"):
			v.add(p+".user", u.User, ErrRange, "a user name cannot contain white space, : or @")
		case u.User == ServiceUser:
			v.add(p+".user", u.User, ErrConflict, "is the service's own user; choose another name")
		default:
			if j, dup := seen[u.User]; dup {
				v.add(p+".user", u.User, ErrDuplicate, "also bus.embedded.users[%d]", j)
			}
			seen[u.User] = i
		}
		if u.PasswordEnv == "" {
			v.add(p+".password_env", "", ErrMissing, "name the environment variable holding the password")
		}
		v.envName(p+".password_env", u.PasswordEnv)
		switch u.Role {
		case RolePublisher, RoleTechnician:
			if u.Role == RoleTechnician && len(u.Sensors) == 0 {
				v.add(p+".sensors", "", ErrMissing, "a technician calibrates the sensors its patterns name, such as [\"qm.u1.>\"]; write [\">\"] for all")
			}
		case RoleReader:
			if len(u.Sensors) > 0 {
				v.add(p+".sensors", strings.Join(u.Sensors, ","), ErrConflict, "a reader reads every sensor (the read API does not filter by sensor); remove it")
			}
		case "":
			v.add(p+".role", "", ErrMissing, "must be publisher, technician or reader")
		default:
			v.add(p+".role", u.Role, ErrRange, "must be publisher, technician or reader")
		}
		for j, pat := range u.Sensors {
			v.sensorPattern(fmt.Sprintf("%s.sensors[%d]", p, j), pat)
		}
	}
	if l := b.MQTT.Listen; l != "" {
		host, port, err := net.SplitHostPort(l)
		n, perr := strconv.Atoi(port)
		switch {
		case err != nil:
			v.add("bus.mqtt.listen", l, ErrRange, "must be host:port, such as 127.0.0.1:1883")
		case perr != nil || n < 1 || n > 65535:
			v.add("bus.mqtt.listen", l, ErrRange, "port must be 1..65535")
		case strings.ContainsAny(host, " \t/@"):
			v.add("bus.mqtt.listen", l, ErrRange, "must be host:port, such as 127.0.0.1:1883")
		}
	}
}

// ServiceUser is the embedded server's own user of the service
// (ingest.ServiceUser): no configured user may take its name.
const ServiceUser = "driftfit-service"

// sensorPattern checks a sensor-id pattern of NATS subject tokens: no
// empty token, * only as a whole token, > only as the whole last token.
func (v *validator) sensorPattern(path, s string) {
	toks := strings.Split(s, ".")
	for i, tok := range toks {
		bad := ""
		switch {
		case tok == "":
			bad = "empty token (two dots in a row, or a leading or trailing dot)"
		case strings.IndexFunc(tok, unicode.IsSpace) >= 0:
			bad = "white space"
		case strings.Contains(tok, ">") && (tok != ">" || i != len(toks)-1):
			bad = "> must be the whole last token"
		case strings.Contains(tok, "*") && tok != "*":
			bad = "* must be a whole token"
		}
		if bad != "" {
			v.add(path, s, ErrRange, "not a sensor-id pattern: %s", bad)
			return
		}
	}
}

func (v *validator) subject(path, s string) {
	if s == "" {
		v.add(path, s, ErrRange, "must not be empty")
		return
	}
	for _, tok := range strings.Split(s, ".") {
		if tok == "" {
			v.add(path, s, ErrRange, "empty subject token (two dots in a row, or a leading or trailing dot)")
			return
		}
		if strings.ContainsAny(tok, "*>") || strings.IndexFunc(tok, unicode.IsSpace) >= 0 {
			v.add(path, s, ErrRange, "a subject cannot contain white space or the wildcards * and >")
			return
		}
	}
}

// envName accepts POSIX-style environment variable names. The value of the
// variable is never read here.
func (v *validator) envName(path, s string) {
	if s == "" {
		return
	}
	for i, r := range s {
		if !(r == '_' || r >= 'A' && r <= 'Z' || r >= 'a' && r <= 'z' || i > 0 && r >= '0' && r <= '9') {
			// Not a name: most likely the secret itself, so not echoed.
			v.add(path, "xxxxx", ErrRange, "must be the name of an environment variable (letters, digits, _), not the secret itself")
			return
		}
	}
}

// redactURL hides the password part of a URL's user information, also in
// strings that do not parse as URLs.
func redactURL(s string) string {
	i := strings.Index(s, "://")
	if i < 0 {
		return s
	}
	rest := s[i+3:]
	end := strings.IndexAny(rest, "/?#")
	if end < 0 {
		end = len(rest)
	}
	at := strings.LastIndexByte(rest[:end], '@')
	if at < 0 {
		return s
	}
	user := rest[:at]
	if c := strings.IndexByte(user, ':'); c >= 0 {
		user = user[:c] + ":xxxxx"
	}
	return s[:i+3] + user + rest[at:]
}

// redactServerURL hides all user information of a NATS URL, which
// without a password is a token.
func redactServerURL(s string) string {
	r := redactURL(s)
	i := strings.Index(r, "://")
	if i < 0 {
		return r
	}
	rest := r[i+3:]
	end := strings.IndexAny(rest, "/?#")
	if end < 0 {
		end = len(rest)
	}
	if at := strings.LastIndexByte(rest[:end], '@'); at >= 0 && !strings.Contains(rest[:at], ":") {
		return r[:i+3] + "xxxxx" + rest[at:]
	}
	return r
}

// redactQuery masks the values of a URL's query parameters, keeping their
// names: webhook receivers often take their token as a query parameter, and
// the names are enough to recognise a URL in a summary or an error.
func redactQuery(s string) string {
	q := strings.IndexByte(s, '?')
	if q < 0 {
		return s
	}
	end := len(s)
	if h := strings.IndexByte(s[q:], '#'); h >= 0 {
		end = q + h
	}
	params := strings.Split(s[q+1:end], "&")
	for i, kv := range params {
		if k, _, ok := strings.Cut(kv, "="); ok {
			params[i] = k + "=xxxxx"
		} else if kv != "" {
			params[i] = "xxxxx"
		}
	}
	return s[:q+1] + strings.Join(params, "&") + s[end:]
}

// redactWebhookURL hides a webhook URL's password and query values.
func redactWebhookURL(s string) string { return redactQuery(redactURL(s)) }

// tickets checks the webhook. The URL is checked with net/url, the scheme
// restricted to http and https (RFC 9110, section 4.2); the header
// variable's value is never read here.
func (v *validator) tickets() {
	w := &v.c.Tickets.Webhook
	const base = "tickets.webhook"
	if w.Timeout <= 0 {
		v.add(base+".timeout", FormatDuration(w.Timeout), ErrRange, "must be > 0")
	}
	if w.MaxBackoff <= 0 {
		v.add(base+".max_backoff", FormatDuration(w.MaxBackoff), ErrRange, "must be > 0")
	}
	v.envName(base+".header_env", w.HeaderEnv)
	if w.URL == "" {
		// Settings for a webhook that does not exist are most likely a
		// forgotten or misspelt url, so they are reported, as bus
		// credentials without servers are.
		for _, f := range []struct{ key, val string }{
			{"timeout", FormatDuration(w.Timeout)}, {"max_backoff", FormatDuration(w.MaxBackoff)}, {"header_env", w.HeaderEnv},
		} {
			if p := base + "." + f.key; v.c.written(p) {
				v.add(p, f.val, ErrConflict, "has no effect without %s.url; set the url or remove it", base)
			}
		}
		return
	}
	p := base + ".url"
	shown := redactWebhookURL(w.URL)
	u, err := url.Parse(w.URL)
	if err != nil {
		detail := err.Error()
		var ue *url.Error
		if errors.As(err, &ue) {
			detail = ue.Err.Error() // ue.URL would repeat the unmasked value
		}
		v.add(p, shown, ErrRange, "not a URL: %s", detail)
		return
	}
	if u.Scheme != "http" && u.Scheme != "https" {
		v.add(p, shown, ErrRange, "scheme must be http or https")
	}
	if u.Host == "" || u.Hostname() == "" {
		v.add(p, shown, ErrRange, "missing host")
	}
	if u.User != nil {
		if _, has := u.User.Password(); has {
			v.add(p, shown, ErrCredential, "remove the password from the URL and put the whole Authorization header value in the environment variable named by %s.header_env", base)
		} else if w.HeaderEnv != "" {
			v.add(p, shown, ErrConflict, "a user name in the URL and %s.header_env both set the Authorization header; keep one", base)
		}
	}
	if u.Fragment != "" || strings.HasSuffix(w.URL, "#") {
		v.add(p, shown, ErrRange, "a fragment (#...) is never sent to the server; remove it")
	}
}

func (v *validator) store() {
	s := &v.c.Store
	if s.Dir == "" {
		v.add("store.dir", "", ErrRange, "must not be empty")
	}
	if s.CommitInterval <= 0 {
		v.add("store.commit_interval", FormatDuration(s.CommitInterval), ErrRange, "must be > 0")
	}
	if s.CommitMaxSensors <= 0 {
		v.add("store.commit_max_sensors", strconv.Itoa(s.CommitMaxSensors), ErrRange, "must be > 0")
	}
	if s.CommitReadings <= 0 {
		v.add("store.commit_readings", strconv.Itoa(s.CommitReadings), ErrRange, "must be > 0")
	}
	if s.HistoryThinAfter < 0 {
		v.add("store.history_thin_after", FormatDuration(s.HistoryThinAfter), ErrRange, "must be >= 0 (0 keeps every record)")
	}
	if s.HistoryThinTo <= 0 {
		v.add("store.history_thin_to", FormatDuration(s.HistoryThinTo), ErrRange, "must be > 0")
	}
	if s.HistoryRetention < 0 {
		v.add("store.history_retention", FormatDuration(s.HistoryRetention), ErrRange, "must be >= 0 (0 keeps history forever)")
	}
}

func (v *validator) http() {
	v.envName("http.token_env", v.c.HTTP.TokenEnv)
	a := v.c.HTTP.Addr
	_, port, err := net.SplitHostPort(a)
	if err != nil {
		v.add("http.addr", a, ErrRange, "must be host:port, e.g. 127.0.0.1:9464")
		return
	}
	if n, err := strconv.Atoi(port); err != nil || n < 0 || n > 65535 {
		v.add("http.addr", a, ErrRange, "port must be a number from 0 to 65535")
	}
}

func (v *validator) windows(path string, ws []Window) {
	if len(ws) == 0 {
		v.add(path, "", ErrWindow, "at least one window is needed")
		return
	}
	spans := map[time.Duration]int{}
	for i, w := range ws {
		p := fmt.Sprintf("%s[%d]", path, i)
		switch {
		case w.Pane <= 0:
			v.add(p+".pane", FormatDuration(w.Pane), ErrWindow, "pane must be > 0")
		case w.Span <= 0:
			v.add(p+".span", FormatDuration(w.Span), ErrWindow, "span must be > 0")
		case w.Span%w.Pane != 0:
			v.add(p+".span", FormatDuration(w.Span), ErrWindow, "span is not a whole multiple of pane %s", FormatDuration(w.Pane))
		case w.Span/w.Pane > maxPanes:
			v.add(p+".pane", FormatDuration(w.Pane), ErrWindow, "%d panes in span %s; at most %d", w.Span/w.Pane, FormatDuration(w.Span), maxPanes)
		}
		if j, dup := spans[w.Span]; dup && w.Span > 0 {
			v.add(p+".span", FormatDuration(w.Span), ErrWindow, "same span as %s[%d]; windows are named by span", path, j)
		}
		spans[w.Span] = i
	}
}

// scope maps a class field to the path it was written at: the sensor's
// entry when the sensor overrides it, the class otherwise.
type scope struct {
	c          *Config
	classPath  string
	sensorPath string
}

func (s scope) where(field string) string {
	if s.sensorPath != "" {
		// The decoder records every non-null value it visits, so a
		// mapping such as "span" is recorded when any key under it is.
		if sp := s.sensorPath + "." + field; s.c.written(sp) {
			return sp
		}
	}
	return s.classPath + "." + field
}

// class checks the fields a sensor can override and fills the canonical
// values. It is run for every class and for every listed sensor's merged
// class.
func (v *validator) class(cl *Class, s scope) {
	unitOK := true
	switch {
	case cl.Unit == "":
		v.add(s.where("unit"), "", ErrMissing, "every class needs a unit, e.g. kPa")
		unitOK = false
	case cl.Unit == spanUnit || strings.IndexFunc(cl.Unit, unicode.IsSpace) >= 0:
		v.add(s.where("unit"), cl.Unit, ErrUnit, "not usable as a unit")
		unitOK = false
	}
	spanOK := false
	switch {
	case cl.Span == (Span{}) && !v.c.written(s.where("span")):
		v.add(s.where("span"), "", ErrMissing, "every class needs its calibrated span {lower, upper}")
	case !(cl.Span.Lower < cl.Span.Upper) || math.IsInf(cl.Span.Width(), 0):
		v.add(s.where("span"), fmt.Sprintf("%g..%g", cl.Span.Lower, cl.Span.Upper), ErrRange, "lower must be below upper")
	default:
		spanOK = true
	}
	convertible := unitOK && spanOK

	tp := s.where("tolerance")
	if cl.Tolerance.Text == "" {
		v.add(tp, "", ErrMissing, "every class needs a tolerance, e.g. \"0.5 kPa\" or \"0.25 %%span\"")
	} else if q, err := parseQuantity(cl.Tolerance.Text, 0); err != nil {
		v.addErr(tp, err)
	} else if convertible {
		abs, err := q.canonical(cl.Unit, cl.Span)
		switch {
		case err != nil:
			v.addErr(tp, withValue(err, cl.Tolerance.Text))
		case abs <= 0:
			v.add(tp, cl.Tolerance.Text, ErrRange, "must be > 0")
		case abs > cl.Span.Width():
			v.add(tp, cl.Tolerance.Text, ErrRange, "exceeds the span width %g %s", cl.Span.Width(), cl.Unit)
		default:
			cl.Tolerance.Abs = abs
		}
	}

	v.windows(s.where("windows"), cl.Windows)
	if cl.TrendModel != TrendLine && cl.TrendModel != TrendParabola {
		v.add(s.where("trend_model"), cl.TrendModel.String(), ErrRange, "must be line or parabola")
	}
	// Every window is fitted with a parabola too, whatever the trend
	// model, and judged only when all its fits can carry an interval.
	if cl.MinReadings < 4 {
		v.add(s.where("min_readings"), strconv.Itoa(cl.MinReadings), ErrRange,
			"must be at least 4: a parabola has 3 coefficients and its confidence interval needs n - 3 >= 1")
	}
	if !(cl.MinCoverage >= 0 && cl.MinCoverage <= 1) {
		v.add(s.where("min_coverage"), fmtFloat(cl.MinCoverage), ErrRange, "must be within 0..1 (a fraction of panes)")
	}
	if cl.Debounce < 1 {
		v.add(s.where("debounce"), strconv.Itoa(cl.Debounce), ErrRange, "must be >= 1 pane close")
	}
	if !(cl.ClearFraction > 0 && cl.ClearFraction < 1) {
		v.add(s.where("clear_fraction"), fmtFloat(cl.ClearFraction), ErrRange, "must be strictly between 0 and 1")
	}
	if cl.Cooldown < 0 {
		v.add(s.where("cooldown"), FormatDuration(cl.Cooldown), ErrRange, "must be >= 0")
	}
	v.rateLimit(&cl.Limits.Slope, 1, s.where("limits.slope"), cl, convertible)
	v.rateLimit(&cl.Limits.Curvature, 2, s.where("limits.curvature"), cl, convertible)
	v.durationLimit(cl.Limits.DoublingTime, s.where("limits.doubling_time"), "doubling time")
	v.durationLimit(cl.Limits.LeadTime, s.where("limits.lead_time"), "lead time")
	v.alarms(cl, s)
}

// alarms checks the alarm budget, the detectors and the ticket kinds.
func (v *validator) alarms(cl *Class, s scope) {
	// Zero not written (a Config built in code) means the default.
	pos := func(path string, x float64) {
		if x == 0 && !v.c.written(s.where(path)) {
			return
		}
		if !(x > 0) || math.IsInf(x, 0) {
			v.add(s.where(path), fmtFloat(x), ErrRange, "must be > 0 (false alarms per sensor-year)")
		}
	}
	pos("alarm_budget.false_tickets_per_year", cl.AlarmBudget.FalseTicketsPerYear)
	pos("alarm_budget.alerts_per_year", cl.AlarmBudget.AlertsPerYear)
	dt := &cl.Detectors
	if dt.Step.K < 0 {
		v.add(s.where("detectors.step.k"), fmtFloat(dt.Step.K), ErrRange, "must be >= 0 (0: 0.5)")
	}
	if dt.Step.H < 0 {
		v.add(s.where("detectors.step.h"), fmtFloat(dt.Step.H), ErrRange, "must be >= 0 (0: from the alarm budget)")
	}
	if dt.Flatline.For < 0 {
		v.add(s.where("detectors.flatline.for"), FormatDuration(dt.Flatline.For), ErrRange, "must be >= 0")
	}
	if dt.Flatline.MinCount == 1 || dt.Flatline.MinCount < 0 {
		v.add(s.where("detectors.flatline.min_count"), strconv.Itoa(dt.Flatline.MinCount), ErrRange, "must be >= 2 (0: 10)")
	}
	if dt.Flatline.Resolution < 0 {
		v.add(s.where("detectors.flatline.resolution"), fmtFloat(dt.Flatline.Resolution), ErrRange, "must be >= 0, in the class unit")
	}
	if dt.Spike.K != 0 && dt.Spike.K < 3 {
		v.add(s.where("detectors.spike.k"), fmtFloat(dt.Spike.K), ErrRange,
			"must be 0 (off) or >= 3: a smaller threshold rejects ordinary readings")
	}
	if dt.Spike.Count < 0 {
		v.add(s.where("detectors.spike.count"), strconv.Itoa(dt.Spike.Count), ErrRange, "must be >= 1 (0: 3)")
	}
	if dt.Spike.Within < 0 {
		v.add(s.where("detectors.spike.within"), FormatDuration(dt.Spike.Within), ErrRange, "must be > 0 (0: 1h)")
	}
	if dt.Silent < 0 {
		v.add(s.where("detectors.silent"), FormatDuration(dt.Silent), ErrRange, "must be >= 0")
	}
	seen := map[string]int{}
	for i, k := range cl.TicketKinds {
		p := s.where(fmt.Sprintf("ticket_kinds[%d]", i))
		if !slices.Contains(TicketKindNames, k) {
			v.add(p, k, ErrRange, "unknown alert kind; one of %s", strings.Join(TicketKindNames, ", "))
		} else if j, dup := seen[k]; dup {
			v.add(p, k, ErrDuplicate, "repeats ticket_kinds[%d]", j)
		}
		seen[k] = i
	}
}

func withValue(err error, value string) error {
	var fe *FieldError
	if errors.As(err, &fe) && fe.Value == "" {
		c := *fe
		c.Value = value
		return &c
	}
	return err
}

func fmtFloat(f float64) string { return strconv.FormatFloat(f, 'g', -1, 64) }

// levelPath is base+".warning"/".critical" when written as a mapping, or
// base when a single value was written.
func (v *validator) levelPath(base, level string) string {
	if v.c.written(base + "." + level) {
		return base + "." + level
	}
	if level == "critical" {
		return base
	}
	return base + "." + level
}

func (v *validator) rateLimit(l *RateLimit, power int, base string, cl *Class, convertible bool) {
	ok := 0
	for _, lv := range []struct {
		name string
		t    *Threshold
	}{{"warning", &l.Warning}, {"critical", &l.Critical}} {
		if lv.t.Text == "" {
			if v.c.written(base + "." + lv.name) {
				v.add(base+"."+lv.name, "", ErrMissing, "empty level")
			}
			continue
		}
		p := v.levelPath(base, lv.name)
		q, err := parseQuantity(lv.t.Text, power)
		if err != nil {
			v.addErr(p, err)
			continue
		}
		if !convertible {
			continue
		}
		val, err := q.canonical(cl.Unit, cl.Span)
		if err != nil {
			v.addErr(p, withValue(err, lv.t.Text))
			continue
		}
		if val <= 0 {
			v.add(p, lv.t.Text, ErrRange, "must be > 0 (limits apply to the magnitude)")
			continue
		}
		lv.t.Value = val
		ok++
	}
	if ok == 2 && l.Warning.Value > l.Critical.Value {
		v.add(base+".warning", l.Warning.Text, ErrLimitOrder, "warning %s is above critical %s", l.Warning.Text, l.Critical.Text)
	}
}

// durationLimit checks a doubling-time or lead-time limit, where a shorter
// time is the more severe, so warning >= critical.
func (v *validator) durationLimit(l DurationLimit, base, what string) {
	for _, lv := range []struct {
		name string
		d    time.Duration
	}{{"warning", l.Warning}, {"critical", l.Critical}} {
		p := v.levelPath(base, lv.name)
		if lv.d < 0 || lv.d == 0 && v.c.written(p) {
			v.add(p, FormatDuration(lv.d), ErrRange, "must be > 0; remove the key to turn the limit off")
		}
	}
	if l.Warning > 0 && l.Critical > 0 && l.Warning < l.Critical {
		v.add(base+".warning", FormatDuration(l.Warning), ErrLimitOrder,
			"warning %s is shorter than critical %s; a shorter %s is more severe, so the warning comes first with the longer time",
			FormatDuration(l.Warning), FormatDuration(l.Critical), what)
	}
}

func (v *validator) classes() {
	c := v.c
	names := map[string]int{}
	pinned := map[string]bool{}
	for _, s := range c.Sensors {
		pinned[s.Class] = true
	}
	for i := range c.Classes {
		cl := &c.Classes[i]
		p := classPath(i)
		if cl.Name == "" {
			v.add(p+".name", "", ErrMissing, "every class needs a name")
		} else if j, dup := names[cl.Name]; dup {
			v.add(p+".name", cl.Name, ErrDuplicate, "same name as classes[%d]", j)
		} else {
			names[cl.Name] = i
		}
		for k, m := range cl.Match {
			if d := validatePattern(m); d != "" {
				v.add(fmt.Sprintf("%s.match[%d]", p, k), m, ErrRange, "%s", d)
			}
		}
		if len(cl.Match) == 0 && !pinned[cl.Name] {
			v.add(p+".match", "", ErrMissing, "the class matches no sensor: give patterns or pin sensors to it")
		}
		v.class(cl, scope{c: c, classPath: p})
	}
	// Pattern overlap between classes: any id matching both would be
	// ambiguous, so it is an error even if no such sensor exists yet.
	for j := range c.Classes {
		for i := range j {
			for kj, pj := range c.Classes[j].Match {
				for _, pi := range c.Classes[i].Match {
					if validatePattern(pi) != "" || validatePattern(pj) != "" {
						continue
					}
					if w, ok := overlap(pi, pj); ok {
						v.add(fmt.Sprintf("%s.match[%d]", classPath(j), kj), pj, ErrOverlap,
							"class %q pattern %q matches the same ids, e.g. %q", c.Classes[i].Name, pi, w)
					}
				}
			}
		}
	}
}

// matchingClasses returns the indices of the classes whose patterns match id.
func (c *Config) matchingClasses(id string) []int {
	var out []int
	for i := range c.Classes {
		for _, m := range c.Classes[i].Match {
			if matchPattern(m, id) {
				out = append(out, i)
				break
			}
		}
	}
	return out
}

func (c *Config) classIndex(name string) int {
	for i := range c.Classes {
		if c.Classes[i].Name == name {
			return i
		}
	}
	return -1
}

func (c *Config) groupIndex(name string) int {
	for i := range c.Groups {
		if c.Groups[i].Name == name {
			return i
		}
	}
	return -1
}

func (c *Config) classNames(idx []int) string {
	names := make([]string, len(idx))
	for k, i := range idx {
		names[k] = strconv.Quote(c.Classes[i].Name)
	}
	return strings.Join(names, ", ")
}

func (v *validator) sensors() {
	c := v.c
	for i := range c.Sensors {
		s := &c.Sensors[i]
		p := sensorPath(s.ID)
		if d := validateID(s.ID); d != "" {
			v.add(p, s.ID, ErrRange, "bad sensor id: %s", d)
			continue
		}
		ci, err := c.baseClass(s.ID, s)
		if err != nil {
			var fe *FieldError
			if errors.As(err, &fe) {
				field := p
				if fe.Err == ErrUndefined {
					field = p + ".class"
				}
				v.add(field, fe.Value, fe.Err, "%s", fe.Detail)
			}
			continue
		}
		if s.Group != "" && c.groupIndex(s.Group) < 0 {
			v.add(p+".group", s.Group, ErrUndefined, "no group named %q under groups", s.Group)
		} else if _, err := c.groupFor(s.ID, s); err != nil {
			var fe *FieldError
			if errors.As(err, &fe) {
				v.add(p, s.ID, fe.Err, "%s", fe.Detail)
			}
		}
		merged := c.merge(ci, s)
		v.note = "(with the settings of sensor " + s.ID + ")"
		v.class(&merged, scope{c: c, classPath: classPath(ci), sensorPath: p})
		v.note = ""
	}
}

func (v *validator) groups() {
	c := v.c
	names := map[string]int{}
	joined := map[string]bool{}
	for _, s := range c.Sensors {
		joined[s.Group] = true
	}
	for i := range c.Groups {
		g := &c.Groups[i]
		p := groupPath(i)
		if g.Name == "" {
			v.add(p+".name", "", ErrMissing, "every group needs a name")
		} else if j, dup := names[g.Name]; dup {
			v.add(p+".name", g.Name, ErrDuplicate, "same name as groups[%d]", j)
		} else {
			names[g.Name] = i
		}
		if len(g.Members) == 0 && !joined[g.Name] {
			v.add(p+".members", "", ErrMissing, "the group has no members: list ids or patterns, or set group on sensors")
		}
		units := map[string]string{} // unit -> class name
		for k, m := range g.Members {
			mp := fmt.Sprintf("%s.members[%d]", p, k)
			if d := validatePattern(m); d != "" {
				v.add(mp, m, ErrRange, "%s", d)
				continue
			}
			for ci := range c.Classes {
				for _, cm := range c.Classes[ci].Match {
					if validatePattern(cm) != "" {
						continue
					}
					if _, ok := overlap(m, cm); ok {
						units[c.Classes[ci].Unit] = c.Classes[ci].Name
					}
				}
			}
		}
		for _, s := range c.Sensors {
			if s.Group == g.Name {
				if cl, err := c.ClassFor(s.ID); err == nil {
					units[cl.Unit] = cl.Name
				}
			}
		}
		if len(units) > 1 {
			var list []string
			for u, n := range units {
				list = append(list, fmt.Sprintf("%s (class %q)", u, n))
			}
			slices.Sort(list)
			v.add(p+".members", "", ErrConflict, "peers must measure the same quantity; members fall in classes with units %s", strings.Join(list, ", "))
		}
	}
	for j := range c.Groups {
		for i := range j {
			for kj, pj := range c.Groups[j].Members {
				for _, pi := range c.Groups[i].Members {
					if validatePattern(pi) != "" || validatePattern(pj) != "" {
						continue
					}
					if w, ok := overlap(pi, pj); ok {
						v.add(fmt.Sprintf("%s.members[%d]", groupPath(j), kj), pj, ErrOverlap,
							"group %q member %q covers the same ids, e.g. %q; a sensor belongs to one peer group", c.Groups[i].Name, pi, w)
					}
				}
			}
		}
	}
}
