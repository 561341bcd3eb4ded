package web_test

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/web"
	"driftfit/ingest"
	"driftfit/store"
)

// chromiumPath is where Debian's chromium package installs the browser.
const chromiumPath = "/usr/bin/chromium"

// artifactDir is where screenshots go: $DRIFTFIT_WEB_ARTIFACTS, else a
// directory of the test.
func artifactDir(t *testing.T) string {
	if d := os.Getenv("DRIFTFIT_WEB_ARTIFACTS"); d != "" {
		if err := os.MkdirAll(d, 0o755); err != nil {
			t.Fatal(err)
		}
		return d
	}
	return t.TempDir()
}

// TestBrowser_FleetToSensor loads the fleet of the demo store in headless
// Chromium, opens the most urgent sensor, checks the chart holds a
// fitted line, its band and an alert marker, and each window's chart its
// pane means, the fit through them and a panel of residuals, then moves
// "as of" back a week and checks the fit shown changed and the panes
// that are gone are not drawn.
func TestBrowser_FleetToSensor(t *testing.T) {
	if _, err := os.Stat(chromiumPath); err != nil {
		if os.Getenv("CI") == "true" {
			t.Fatalf("chromium not installed at %s, and CI=true requires the browser test", chromiumPath)
		}
		t.Skipf("chromium not installed at %s (apt-get install -y chromium); skipped outside CI", chromiumPath)
	}
	if _, err := exec.LookPath(chromiumPath); err != nil {
		t.Fatal(err)
	}
	db := openDB(t)
	fillDemo(t, db)
	// The clock runs from the end of the demo, so the fleet the pages
	// share for 2 s expires as it would in service.
	start := time.Now()
	now := func() time.Time { return demoEnd.Add(time.Since(start)) }
	srv := httptest.NewServer(web.Handler(web.Options{DB: db, Rule: ruleFunc(demoRules()), Now: now, Refresh: time.Second}))
	t.Cleanup(srv.Close)
	dir := artifactDir(t)
	t.Logf("screenshots in %s", dir)

	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(chromiumPath),
		chromedp.Flag("headless", true),
		chromedp.Flag("no-sandbox", true),
		chromedp.Flag("disable-gpu", true),
		chromedp.Flag("disable-quic", true),
		chromedp.Flag("no-first-run", true),
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.UserDataDir(t.TempDir()),
		chromedp.WindowSize(1360, 1500),
	}
	actx, cancelA := chromedp.NewExecAllocator(t.Context(), opts...)
	defer cancelA()
	ctx, cancel := chromedp.NewContext(actx)
	defer cancel()
	ctx, cancelT := context.WithTimeout(ctx, 60*time.Second)
	defer cancelT()

	css := func(s string) chromedp.CSS { return chromedp.CSS(s) }
	// shot writes the whole page (quality 100 makes a PNG), or for the
	// long sensor pages the first screen of it.
	shot := func(name string, full bool) {
		t.Helper()
		a := chromedp.CaptureScreenshot()
		if full {
			a = chromedp.FullScreenshot(100)
		}
		png, err := chromedp.Run(ctx, a)
		if err != nil {
			t.Fatalf("screenshot %s: %v", name, err)
		}
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, png, 0o644); err != nil {
			t.Fatal(err)
		}
		t.Logf("screenshot %s", p)
	}
	chartShot := func(name string) {
		t.Helper()
		png, err := chromedp.Run(ctx, chromedp.Screenshot(css(`figure.chart`)))
		if err != nil {
			t.Fatalf("screenshot %s: %v", name, err)
		}
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, png, 0o644); err != nil {
			t.Fatal(err)
		}
		t.Logf("screenshot %s", p)
	}
	elemShot := func(sel, name string) {
		t.Helper()
		png, err := chromedp.Run(ctx, chromedp.Screenshot(css(sel)))
		if err != nil {
			t.Fatalf("screenshot %s: %v", name, err)
		}
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, png, 0o644); err != nil {
			t.Fatal(err)
		}
		t.Logf("screenshot %s", p)
	}
	attr := func(sel, name string) string {
		t.Helper()
		v, err := chromedp.Run(ctx, chromedp.AttributeValue(css(sel), name))
		if err != nil {
			t.Fatalf("attribute %s of %s: %v", name, sel, err)
		}
		return v.Value
	}
	count := func(sel string) int {
		t.Helper()
		n, err := chromedp.Run(ctx, chromedp.Evaluate[int](`document.querySelectorAll(`+"`"+sel+"`"+`).length`))
		if err != nil {
			t.Fatalf("count %s: %v", sel, err)
		}
		return n
	}
	text := func(sel string) string {
		t.Helper()
		v, err := chromedp.Run(ctx, chromedp.Text(css(sel)))
		if err != nil {
			t.Fatalf("text of %s: %v", sel, err)
		}
		return v
	}

	// The fleet: the table is drawn by the server, then redrawn in place
	// by the page's script from /api/fleet (data-updated is set then).
	if err := chromedp.Do(ctx,
		chromedp.Navigate(srv.URL+"/"),
		chromedp.WaitVisible(css(`#fleet-body tr`)),
		chromedp.WaitVisible(css(`#fleet-body[data-updated]`)),
	); err != nil {
		t.Fatalf("fleet page: %v", err)
	}
	updated := attr(`#fleet-body`, "data-updated")
	firstID := text(`#fleet-body tr:first-child td.id a`)
	shot("fleet.png", true)
	// The most urgent sensor is the one whose open ticket falls due
	// first: the gas detector's (TestFleet_DemoRanking checks the order
	// against the stored tickets).
	if firstID != idGD {
		t.Errorf("first row = %q, want %q", firstID, idGD)
	}

	if err := chromedp.Do(ctx,
		chromedp.Click(css(`#fleet-body tr:first-child td.id a`)),
		chromedp.WaitVisible(css(`#chart`)),
	); err != nil {
		t.Fatalf("sensor page: %v", err)
	}
	nLine, nBand, nAlert := count(`#chart path.fit-line`), count(`#chart path.fit-band`), count(`#chart .marker-alert`)
	if nLine < 1 || nBand < 1 || nAlert < 1 {
		t.Errorf("chart holds %d fit lines, %d bands, %d alert markers; want at least one each", nLine, nBand, nAlert)
	}
	level0 := attr(`#chart path.fit-line[data-window="14d/1d"]`, "data-value")
	// The band must be a closed area, not empty path data.
	if d := attr(`#chart path.fit-band`, "d"); !strings.HasSuffix(d, "Z") || strings.Count(d, "L") < 10 {
		t.Errorf("band path %q is not a closed area", d)
	}
	shot("sensor-now.png", false)
	chartShot("sensor-now-chart.png")
	// The pane means of each window, the fit through them and the
	// residuals beneath: as many points as the API lists panes.
	api := getJSON[sensorPanesJSON](t, srv, "/api/sensors/"+idGD)
	for i, w := range api.Windows {
		fig := fmt.Sprintf(`figure.pane-chart#panes-%d[data-window="%s"]`, i, w.Window)
		means, resids := count(fig+` circle.pane-mean`), count(fig+` circle.resid-point`)
		if means != len(w.Panes) || means == 0 || count(fig+` g#panel-resid-`+strconv.Itoa(i)) != 1 || resids != means ||
			count(fig+` path.fit-line`) != 1 || count(fig+` path.fit-band`) != 1 {
			t.Errorf("%s: %d pane means (API %d), %d residual points, residual panel %d, fit line %d, band %d",
				fig, means, len(w.Panes), resids, count(fig+` g#panel-resid-`+strconv.Itoa(i)), count(fig+` path.fit-line`), count(fig+` path.fit-band`))
		}
		elemShot(fig, fmt.Sprintf("sensor-now-panes-%d.png", i))
	}
	shot("sensor-now-full.png", true)

	if err := chromedp.Do(ctx,
		chromedp.Click(css(`#back7d`)),
		chromedp.WaitVisible(css(`.asof-text b`)),
		chromedp.WaitVisible(css(`#chart`)),
	); err != nil {
		t.Fatalf("as of a week back: %v", err)
	}
	level1 := attr(`#chart path.fit-line[data-window="14d/1d"]`, "data-value")
	stamp1 := text(`.asof-text`)
	shot("sensor-asof-minus-7d.png", false)
	// A week back the 1-day window's panes are gone: the page says so
	// and draws none; the 14-day window keeps those of its panes that
	// the current window still holds.
	elemShot(`#panes-0`, "sensor-asof-minus-7d-panes-0.png")
	elemShot(`#panes-1`, "sensor-asof-minus-7d-panes-1.png")
	// SVG text has no innerText: read its textContent.
	msg, err := chromedp.Run(ctx, chromedp.Evaluate[string](`(document.querySelector('#panes-0 text.pane-empty') || {}).textContent || ''`))
	if err != nil {
		t.Fatal(err)
	}
	if n := count(`#panes-0 circle.pane-mean`); n != 0 || !strings.Contains(msg, "readings are kept for the current window only") {
		t.Errorf("1d/1h a week back: %d pane means, message %q; want none, and why", n, msg)
	}
	apiPast := getJSON[sensorPanesJSON](t, srv, "/api/sensors/"+idGD+"?asof="+demoEnd.Add(-7*24*time.Hour).Format(time.RFC3339))
	if n, want := count(`#panes-1 circle.pane-mean`), len(apiPast.Windows[1].Panes); n != want || n == 0 || n >= len(api.Windows[1].Panes) {
		t.Errorf("14d/1d a week back: %d pane means, the API %d, now %d; want the API's, fewer than now", n, want, len(api.Windows[1].Panes))
	}
	if level1 == "" || level1 == level0 {
		t.Errorf("14d/1d fit level as of a week back = %q, now %q; want a different fit", level1, level0)
	}
	if !strings.Contains(stamp1, "24 Nov 2026") {
		t.Errorf("as-of text %q, want it to name 24 Nov 2026", stamp1)
	}
	t.Logf("fleet updated %s; first %s; level now %s, a week back %s", updated, firstID, level0, level1)

	// The thermocouple is judged on a parabola: its curve through the
	// pane means, and their residuals.
	if err := chromedp.Do(ctx,
		chromedp.Navigate(srv.URL+"/sensors/"+idTC),
		chromedp.WaitVisible(css(`#panes-1`)),
	); err != nil {
		t.Fatalf("thermocouple page: %v", err)
	}
	for i := range demoWindows {
		fig := fmt.Sprintf("#panes-%d", i)
		if n, r := count(fig+` circle.pane-mean`), count(fig+` circle.resid-point`); n == 0 || r != n {
			t.Errorf("thermocouple %s: %d pane means, %d residuals", fig, n, r)
		}
		elemShot(fig, fmt.Sprintf("thermocouple-panes-%d.png", i))
	}

	// A temperature sensor given two calibration records: no. 1 voided,
	// drawn as a struck ring without a rule and titled with why; no. 2
	// standing, a filled circle with its rule.
	cals := map[uint64][]byte{}
	for _, r := range []ingest.CalibrationRecord{
		{Seq: 1, Time: demoEnd.Add(-6 * 24 * time.Hour), AsFound: 181, AsLeft: 180.5, Recorded: demoEnd.Add(-6 * 24 * time.Hour),
			Status: ingest.CalibrationVoided, Changed: demoEnd.Add(-5 * 24 * time.Hour), Reason: "entered for the wrong tag"},
		{Seq: 2, Time: demoEnd.Add(-3 * 24 * time.Hour), AsFound: 180.4, AsLeft: 180, Recorded: demoEnd.Add(-3 * 24 * time.Hour),
			Status: ingest.CalibrationRecorded},
	} {
		r.Sensor = idTT
		data, err := json.Marshal(r)
		if err != nil {
			t.Fatal(err)
		}
		cals[r.Seq] = data
	}
	if err := db.WriteAlerts([]store.AlertWrite{{Sensor: idTT, Calibrations: cals}}); err != nil {
		t.Fatal(err)
	}
	if err := chromedp.Do(ctx,
		chromedp.Navigate(srv.URL+"/sensors/"+idTT),
		chromedp.WaitVisible(css(`#chart`)),
	); err != nil {
		t.Fatalf("temperature page: %v", err)
	}
	title, err := chromedp.Run(ctx, chromedp.Evaluate[string](`(document.querySelector('#chart .marker-cal-voided title') || {}).textContent || ''`))
	if err != nil {
		t.Fatal(err)
	}
	if v, c, r := count(`#chart .marker-cal-voided`), count(`#chart circle.marker-cal`), count(`#chart line.cal-rule`); v != 1 || c != 1 || r != 1 ||
		!strings.Contains(title, "voided") || !strings.Contains(title, "entered for the wrong tag") {
		t.Errorf("temperature chart: %d voided markers (title %q), %d calibration markers, %d rules; want one each, the voided one saying why", v, title, c, r)
	}
	elemShot(`#chart`, "sensor-voided-calibration-chart.png")

	// Back on the fleet, a ticket stored meanwhile (due before every
	// demo ticket, so the most urgent) reaches the table without a reload: the marker set in the
	// page survives, and the flow meter's row moves to the top.
	if err := chromedp.Do(ctx,
		chromedp.Navigate(srv.URL+"/"),
		chromedp.WaitVisible(css(`#fleet-body tr`)),
		chromedp.Evaluate[chromedp.Void](`window.notReloaded = true`),
	); err != nil {
		t.Fatal(err)
	}
	tk := alert.Ticket{ID: idFM + "@test", Sensor: idFM, Opened: demoStart, Reason: alert.Slope,
		Severity: alert.Critical, Window: "14d/1d", Due: demoStart.Add(24 * time.Hour)}
	data, err := json.Marshal(tk)
	if err != nil {
		t.Fatal(err)
	}
	if err := db.WriteAlerts([]store.AlertWrite{{Sensor: idFM, Tickets: map[string][]byte{tk.ID: data}}}); err != nil {
		t.Fatal(err)
	}
	if err := chromedp.Do(ctx, chromedp.Poll[chromedp.Void](
		`document.querySelector('#fleet-body tr:first-child td.id').textContent === `+"`"+idFM+"`",
		chromedp.WithPollingTimeout(20*time.Second))); err != nil {
		first, _ := chromedp.Run(ctx, chromedp.Evaluate[string](`document.querySelector('#fleet-body tr:first-child').textContent + ' | ' + document.getElementById('live').textContent`))
		shot("fleet-not-refreshed.png", true)
		t.Fatalf("the new ticket did not reach the table: %v; first row %q", err, first)
	}
	kept, err := chromedp.Run(ctx, chromedp.Evaluate[bool](`window.notReloaded === true`))
	if err != nil || !kept {
		t.Errorf("the page reloaded to show the ticket (marker kept: %v, %v)", kept, err)
	}
	shot("fleet-refreshed.png", true)
}
