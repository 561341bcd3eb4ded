package web_test

import (
	"net/http"
	"net/http/httptest"
	"net/url"
	"strings"
	"testing"
	"time"

	"driftfit/cmd/driftfit/internal/web"
)

// FuzzSensorPath sends arbitrary ids and as-of values to the sensor
// routes. Properties: no panic, and every answer is 200, 400 or 404 with
// a body that names the problem, never a server error.
func FuzzSensorPath(f *testing.F) {
	for _, s := range []string{idPT, idOdd, idEvil, "qm..x", "a.b.csv", "x.json", "\x00", "%2e%2e", "a/../b", "qm.u1 x", "é.ü"} {
		f.Add(s, "2026-11-20T00:00:00Z")
	}
	f.Add(idPT, "yesterday")
	f.Add(idPT, "2026-11-20T00:00")
	db := openDB(f)
	fillDemo(f, db)
	h := web.Handler(web.Options{DB: db, Rule: ruleFunc(demoRules()), Now: func() time.Time { return demoEnd }})
	f.Fuzz(func(t *testing.T, id, asof string) {
		for _, base := range []string{"/sensors/", "/api/sensors/"} {
			target := base + url.PathEscape(id) + "?asof=" + url.QueryEscape(asof)
			req := httptest.NewRequest(http.MethodGet, "http://driftfit.invalid/", nil)
			u, err := url.Parse(target)
			if err != nil {
				t.Skip()
			}
			req.URL = u
			rec := httptest.NewRecorder()
			h.ServeHTTP(rec, req)
			switch rec.Code {
			case http.StatusOK, http.StatusNotFound, http.StatusBadRequest, http.StatusMovedPermanently, http.StatusTemporaryRedirect:
			default:
				t.Fatalf("GET %s = %d: %.300s", target, rec.Code, rec.Body.String())
			}
			if rec.Code >= 400 && !strings.Contains(rec.Body.String(), "error") && !strings.Contains(rec.Body.String(), "msg") {
				t.Fatalf("GET %s = %d without a message: %.300s", target, rec.Code, rec.Body.String())
			}
		}
	})
}
