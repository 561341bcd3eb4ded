package main

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/query"
	"driftfit/cmd/driftfit/internal/replay"
	"driftfit/ingest"
)

// TestCalibrated_VoidCorrectFromFile runs serve in process and uses the
// commands as an engineer would: a calibration closes the drifting
// sensor's ticket, is voided (the ticket reopens) and refused a second
// void; a fleet file with good and bad rows reports every row, keeps the
// good ones and exits 1; a correction replaces the calibration in force;
// calibrations lists it all the same from the service and, once serve
// has stopped, from the file, and exports what is in force as a file
// the reader takes back.
func TestCalibrated_VoidCorrectFromFile(t *testing.T) {
	if testing.Short() {
		t.Skip("runs serve")
	}
	dir := t.TempDir()
	ns := startNATS(t, filepath.Join(dir, "nats"), 0)
	url := ns.ClientURL()
	cfg := testConfig(t, dir, url, "stream")
	js := readingStream(t, url)
	ids, rs, owner := crashReadings(7, 100) // crash.s0000 drifts and opens a ticket
	for i, r := range rs {
		if _, err := js.Publish(t.Context(), "driftfit.in."+ids[owner[i]], ingest.AppendReading(nil, ingest.Decoded{Reading: r})); err != nil {
			t.Fatal(err)
		}
	}
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	tickets, err := nc.SubscribeSync("driftfit.tickets")
	if err != nil {
		t.Fatal(err)
	}
	var logs syncBuf
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- runServe(ctx, []string{"--config", cfg, "--http-addr", "off"}, nil, &logs, &logs) }()
	stopped := false
	stop := func() {
		if stopped {
			return
		}
		stopped = true
		cancel()
		if err := <-done; err != nil {
			t.Errorf("serve: %v", err)
		}
	}
	defer stop()
	m, err := tickets.NextMsg(30 * time.Second)
	if err != nil {
		t.Fatalf("no ticket: %v; log:\n%s", err, logs.String())
	}
	var opened alert.Ticket
	if err := json.Unmarshal(m.Data, &opened); err != nil || opened.Sensor != "crash.s0000" {
		t.Fatalf("ticket %s: %v", m.Data, err)
	}
	for deadline := time.Now().Add(30 * time.Second); !strings.Contains(logs.String(), "ingest started"); time.Sleep(20 * time.Millisecond) {
		if time.Now().After(deadline) {
			t.Fatalf("serve did not start; log:\n%s", logs.String())
		}
	}
	cmd := func(args ...string) (string, string, int) {
		t.Helper()
		return runCmd(t, "", append(args, "--config", cfg, "--servers", url)...)
	}
	mustCmd := func(want string, args ...string) string {
		t.Helper()
		out, stderr, code := cmd(args...)
		if code != 0 || !strings.Contains(out, want) {
			t.Fatalf("%v: exit %d, stdout %q, want %q; stderr:\n%s", args, code, out, want, stderr)
		}
		return out
	}
	at := time.Unix(0, rs[len(rs)-1].UnixNano).Add(time.Minute).UTC().Truncate(time.Second)
	atText := at.Format(time.RFC3339)
	mustCmd("calibration 1 of crash.s0000 recorded (as-found 502.5, as-left 500, at "+atText+"); ticket "+opened.ID+" closed",
		"calibrated", "crash.s0000", "--as-found", "502.5", "--as-left", "500", "--at", atText)
	mustCmd("calibration 1 of crash.s0000 voided; ticket "+opened.ID+" reopened",
		"calibrated", "crash.s0000", "--void", "1", "--reason", "entered for the wrong tag")
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"--void", "1"}, `calibration 1 of sensor "crash.s0000": already voided at`},
		{[]string{"--void", "9"}, `calibration 9 of sensor "crash.s0000": none recorded: its calibrations are numbered 1 to 1`},
		{[]string{"--correct", "1", "--as-found", "1", "--as-left", "1"}, `calibration 1 of sensor "crash.s0000": already voided at`},
	} {
		_, stderr, code := cmd(append([]string{"calibrated", "crash.s0000"}, c.args...)...)
		if code != 1 || !strings.Contains(stderr, c.want) {
			t.Errorf("calibrated crash.s0000 %v: exit %d, stderr %q; want 1 and %q", c.args, code, stderr, c.want)
		}
	}

	// A fleet's as-left values, with bad rows among them.
	at2 := at.Add(-30 * time.Second).Format(time.RFC3339)
	file := filepath.Join(dir, "fleet.csv")
	rows := "sensor,time,as_found,as_left,technician\n" +
		"crash.s0001," + atText + ",500.4,500,A. Tech\n" + // 2
		"crash.s0002," + atText + ",abc,500,A. Tech\n" + // 3: not a number
		"crash.zz99," + atText + ",1,1,A. Tech\n" + // 4: never reported
		"crash.s0003,2030-01-01T00:00:00Z,1,1,A. Tech\n" + // 5: in the future
		"crash.s0000," + at2 + ",502,500.2,A. Tech\n" + // 6: closes the reopened ticket
		"qm..x," + atText + ",1,1,A. Tech\n" + // 7: bad id
		"crash.s0004," + atText + ",499.8,500,A. Tech\n" // 8
	if err := os.WriteFile(file, []byte(rows), 0o600); err != nil {
		t.Fatal(err)
	}
	out, stderr, code := cmd("calibrated", "--from", file, "--parallel", "3")
	want := []string{
		"line 2: calibration 1 of crash.s0001 recorded (as-found 500.4, as-left 500, at " + atText + ")",
		`line 3: refused: as_found "abc": not a number`,
		`line 4: crash.zz99: refused by the service: sensor has never reported: "crash.zz99"`,
		"line 5: crash.s0003: refused by the service: t 2030-01-01T00:00:00Z is more than",
		"line 6: calibration 2 of crash.s0000 recorded (as-found 502, as-left 500.2, at " + at2 + "); ticket " + opened.ID + " closed",
		`line 7: refused: sensor "qm..x": ingest: invalid sensor id: empty token`,
		"line 8: calibration 1 of crash.s0004 recorded (as-found 499.8, as-left 500, at " + atText + ")",
		file + ": 7 rows: 3 recorded, 4 refused",
	}
	t.Logf("calibrated --from:\n%s", out)
	lines := strings.Split(strings.TrimSuffix(out, "\n"), "\n")
	if code != 1 || len(lines) != len(want) || !strings.Contains(stderr, "4 of 7 rows refused") {
		t.Fatalf("calibrated --from: exit %d, stderr %q, stdout:\n%s", code, stderr, out)
	}
	for i := range want {
		if !strings.HasPrefix(lines[i], want[i]) {
			t.Errorf("calibrated --from line %d:\n got %s\nwant %s…", i+1, lines[i], want[i])
		}
	}

	mustCmd("calibration 2 of crash.s0000 corrected by calibration 3 (as-found 502, as-left 500.25, at "+at2+")",
		"calibrated", "crash.s0000", "--correct", "2", "--as-found", "502", "--as-left", "500.25", "--reason", "as-left misread")

	// The listing, through the service (serve holds the file).
	table := mustCmd("crash.s0000", "calibrations")
	t.Logf("calibrations:\n%s", table)
	for _, w := range []string{
		"crash.s0000  1    " + atText + "  502.5     500      voided",
		`"entered for the wrong tag"; ticket ` + opened.ID + " closed; ticket " + opened.ID + " reopened",
		"crash.s0000  2    " + at2 + "  502       500.2    corrected",
		"crash.s0000  3    " + at2 + "  502       500.25   in force",
		"corrects 2",
		"crash.s0001  1    " + atText + "  500.4     500      in force",
	} {
		if !strings.Contains(table, w) {
			t.Errorf("calibrations table lacks %q:\n%s", w, table)
		}
	}
	viaService := mustCmd(`"sensor":"crash.s0000"`, "calibrations", "--format", "json")
	var recs []query.Calibration
	for _, l := range strings.Split(strings.TrimSpace(viaService), "\n") {
		var c query.Calibration
		if err := json.Unmarshal([]byte(l), &c); err != nil {
			t.Fatal(err)
		}
		recs = append(recs, c)
	}
	if len(recs) != 5 || recs[1].Status != ingest.CalibrationCorrected || recs[1].CorrectedBy != 3 || recs[1].Reason != "as-left misread" ||
		!recs[2].InForce || recs[2].Corrects != 2 || recs[0].Status != ingest.CalibrationVoided || recs[0].InForce {
		t.Errorf("calibrations as JSON: %+v", recs)
	}
	export := mustCmd("sensor,seq,time,as_found,as_left,status,in_force", "calibrations", "--in-force", "--format", "csv")
	cals, bad, err := replay.ReadCalibrations(strings.NewReader(export))
	if err != nil || len(bad) != 0 || len(cals) != 3 {
		t.Fatalf("export of the calibrations in force read back: %+v, %v, %v; want 3 rows:\n%s", cals, bad, err, export)
	}
	got := map[string]float64{}
	for _, c := range cals {
		got[c.Sensor] = c.AsLeft
	}
	if fmt.Sprint(got) != "map[crash.s0000:500.25 crash.s0001:500 crash.s0004:500]" {
		t.Errorf("as-left values in force: %v", got)
	}
	tks := mustCmd(`"amendments"`, "tickets", "--format", "json")
	if !strings.Contains(tks, `"action":"voided"`) || !strings.Contains(tks, `"action":"corrected"`) || !strings.Contains(tks, `"reason":"as-left misread"`) {
		t.Errorf("tickets listing lacks the amendments:\n%s", tks)
	}

	// The file itself says the same once serve has stopped.
	stop()
	fromFile, stderr, code := runCmd(t, "", "calibrations", "--format", "json", "--db", filepath.Join(dir, "data", dbFile))
	if code != 0 || fromFile != viaService {
		t.Errorf("calibrations from the file: exit %d, stderr %q\n got %s\nwant %s", code, stderr, fromFile, viaService)
	}
}
