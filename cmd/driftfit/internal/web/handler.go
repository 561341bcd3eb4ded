package web

import (
	"bytes"
	"crypto/subtle"
	"encoding/json"
	"errors"
	"net/http"
	"strings"
	"sync"
	"time"
)

type handler struct {
	o   Options
	mux *http.ServeMux

	mu         sync.Mutex
	firstLevel map[string]AsLeft // sensor id + 0x00 + calibration time → first judged level
	cached     *Fleet            // the last fleet computed for "now"
}

// tokenCookie carries the bearer token for a browser, set by the login
// form, so that pages and their script need no header.
const tokenCookie = "driftfit_token"

// Handler returns the pages and their JSON (see the package comment for
// the routes). It panics if o.DB is nil.
func Handler(o Options) http.Handler {
	if o.DB == nil {
		panic("web: Options.DB is nil")
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.Refresh <= 0 {
		o.Refresh = defaultRefresh
	}
	if o.Location == nil {
		o.Location = time.UTC
	}
	o.Logger = o.Logger.With().Str("component", "web").Logger()
	h := &handler{o: o, mux: http.NewServeMux(), firstLevel: map[string]AsLeft{}}
	h.mux.HandleFunc("GET /{$}", h.fleetPage)
	h.mux.HandleFunc("GET /api/fleet", h.fleetAPI)
	h.mux.HandleFunc("GET /sensors/{id...}", h.sensorPage)
	h.mux.HandleFunc("GET /api/sensors/{id...}", h.sensorAPI)
	h.mux.HandleFunc("GET /assets/{name}", h.asset)
	h.mux.HandleFunc("POST /login", h.login)
	h.mux.HandleFunc("/", func(w http.ResponseWriter, r *http.Request) {
		h.fail(w, r, http.StatusNotFound, "no page at "+r.URL.Path)
	})
	return h
}

func (h *handler) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	hd := w.Header()
	// Everything the pages need is served from here; nothing is fetched
	// from elsewhere, and no other site may frame them.
	hd.Set("Content-Security-Policy", "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'")
	hd.Set("X-Content-Type-Options", "nosniff")
	hd.Set("Referrer-Policy", "no-referrer")
	if h.o.Token != "" && !public(r) && !h.authorized(r) {
		hd.Set("WWW-Authenticate", `Bearer realm="driftfit"`)
		if wantsJSON(r) {
			writeJSON(w, http.StatusUnauthorized, map[string]string{"error": "a bearer token is required"})
			return
		}
		h.renderLogin(w, r, http.StatusUnauthorized, "")
		return
	}
	h.mux.ServeHTTP(w, r)
}

// public says the request needs no token: the login form's post and the
// style sheet and mark it shows.
func public(r *http.Request) bool {
	return r.Method == http.MethodPost && r.URL.Path == "/login" ||
		r.Method == http.MethodGet && (r.URL.Path == "/assets/style.css" || r.URL.Path == "/assets/mark.svg")
}

func (h *handler) authorized(r *http.Request) bool {
	if a := r.Header.Get("Authorization"); strings.HasPrefix(a, "Bearer ") {
		return h.tokenOK(strings.TrimPrefix(a, "Bearer "))
	}
	if c, err := r.Cookie(tokenCookie); err == nil {
		return h.tokenOK(c.Value)
	}
	return false
}

func (h *handler) tokenOK(s string) bool {
	return subtle.ConstantTimeCompare([]byte(s), []byte(h.o.Token)) == 1
}

func (h *handler) login(w http.ResponseWriter, r *http.Request) {
	if h.o.Token == "" {
		http.Redirect(w, r, "/", http.StatusSeeOther)
		return
	}
	next := r.PostFormValue("next")
	// Only a path of this site: "//host" and "/\host" would leave it.
	if !strings.HasPrefix(next, "/") || strings.HasPrefix(next, "//") || strings.HasPrefix(next, "/\\") {
		next = "/"
	}
	if !h.tokenOK(r.PostFormValue("token")) {
		h.renderLogin(w, r, http.StatusUnauthorized, "That token is not the one configured.")
		return
	}
	http.SetCookie(w, &http.Cookie{Name: tokenCookie, Value: h.o.Token, Path: "/", HttpOnly: true,
		Secure: r.TLS != nil, SameSite: http.SameSiteStrictMode})
	http.Redirect(w, r, next, http.StatusSeeOther)
}

func wantsJSON(r *http.Request) bool {
	return strings.HasPrefix(r.URL.Path, "/api/") || strings.HasSuffix(r.URL.Path, ".json") || r.URL.Query().Get("format") == "json"
}

// asOf reads ?asof=: RFC 3339, or empty for now. live says it is now.
func (h *handler) asOf(r *http.Request) (t time.Time, live bool, err error) {
	s := strings.TrimSpace(r.URL.Query().Get("asof"))
	if s == "" {
		return h.o.Now(), true, nil
	}
	t, err = time.Parse(time.RFC3339Nano, s)
	if err != nil {
		// The form's datetime-local field sends "2026-12-03T08:15"
		// without a zone; it is read in the pages' time zone.
		if t2, err2 := time.ParseInLocation("2006-01-02T15:04", s, h.o.Location); err2 == nil {
			return t2, false, nil
		}
		return time.Time{}, false, &QueryError{Param: "asof", Value: s, Reason: "want an RFC 3339 time such as 2026-12-03T08:15:00Z"}
	}
	return t, false, nil
}

// sensorID takes the id and the format from the path and ?format=. A
// trailing .csv or .json is the format unless ?format= says otherwise.
func sensorID(r *http.Request, api bool) (id, format string, err error) {
	id = r.PathValue("id")
	format = r.URL.Query().Get("format")
	switch format {
	case "":
		switch {
		case api:
			format = "json"
		case strings.HasSuffix(id, ".csv"):
			id, format = strings.TrimSuffix(id, ".csv"), "csv"
		case strings.HasSuffix(id, ".json"):
			id, format = strings.TrimSuffix(id, ".json"), "json"
		default:
			format = "html"
		}
	case "html", "csv", "json":
	default:
		return id, "", &QueryError{Param: "format", Value: format, Reason: "want html, csv or json"}
	}
	return id, format, checkID(id)
}

func (h *handler) fleetFilter(r *http.Request) (fleetFilter, error) {
	q := r.URL.Query()
	f := fleetFilter{Q: strings.TrimSpace(q.Get("q")), Class: q.Get("class"), State: q.Get("state")}
	switch f.State {
	case "", StateJudged, StateNotJudged, StateNoRule:
	default:
		return f, &QueryError{Param: "state", Value: f.State, Reason: "want judged, not_judged or no_rule"}
	}
	return f, nil
}

func (h *handler) fleetAPI(w http.ResponseWriter, r *http.Request) {
	if q, ok := h.fleetOf(w, r); ok {
		writeJSON(w, http.StatusOK, q.f)
	}
}

// fleetQuery is a fleet request read and answered: as of when (live: now)
// with which filter, and the fleet.
type fleetQuery struct {
	asof time.Time
	live bool
	flt  fleetFilter
	f    *Fleet
}

// fleetOf reads the fleet a request asks for; on a bad request or a
// failure it has answered already and ok is false.
func (h *handler) fleetOf(w http.ResponseWriter, r *http.Request) (q fleetQuery, ok bool) {
	var err error
	if q.asof, q.live, err = h.asOf(r); err != nil {
		h.fail(w, r, http.StatusBadRequest, err.Error())
		return q, false
	}
	if q.flt, err = h.fleetFilter(r); err != nil {
		h.fail(w, r, http.StatusBadRequest, err.Error())
		return q, false
	}
	if q.f, err = h.fleet(q.asof, q.live, q.flt); err != nil {
		h.internal(w, r, err)
		return q, false
	}
	return q, true
}

func (h *handler) sensorAPI(w http.ResponseWriter, r *http.Request) {
	h.serveSensor(w, r, true)
}

func (h *handler) sensorPage(w http.ResponseWriter, r *http.Request) {
	h.serveSensor(w, r, false)
}

func (h *handler) serveSensor(w http.ResponseWriter, r *http.Request, api bool) {
	id, format, err := sensorID(r, api)
	if err != nil {
		h.fail(w, r, http.StatusBadRequest, err.Error())
		return
	}
	asof, live, err := h.asOf(r)
	if err != nil {
		h.fail(w, r, http.StatusBadRequest, err.Error())
		return
	}
	v, err := h.sensor(id, asof, live)
	if errors.Is(err, ErrUnknownSensor) {
		h.fail(w, r, http.StatusNotFound, "sensor "+quote(id)+" is not known: no fit history, alert or ticket is stored for it")
		return
	}
	if err != nil {
		h.internal(w, r, err)
		return
	}
	switch format {
	case "json":
		writeJSON(w, http.StatusOK, v)
	case "csv":
		h.writeCSV(w, v)
	default:
		h.renderSensor(w, r, v)
	}
}

func quote(s string) string {
	b, _ := json.Marshal(s)
	return string(b)
}

func writeJSON(w http.ResponseWriter, status int, v any) {
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	enc.SetIndent("", " ")
	if err := enc.Encode(v); err != nil {
		http.Error(w, "encoding failed: "+err.Error(), http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "application/json; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(status)
	_, _ = w.Write(buf.Bytes())
}

// fail answers with a message: JSON for the API, else a small page.
func (h *handler) fail(w http.ResponseWriter, r *http.Request, status int, msg string) {
	if wantsJSON(r) {
		writeJSON(w, status, map[string]string{"error": msg})
		return
	}
	h.renderError(w, status, msg)
}

func (h *handler) internal(w http.ResponseWriter, r *http.Request, err error) {
	h.o.Logger.Warn().Err(err).Str("path", r.URL.Path).Msg("page failed")
	h.fail(w, r, http.StatusInternalServerError, "reading the state file failed: "+err.Error())
}
