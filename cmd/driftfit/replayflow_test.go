package main

import (
	"bytes"
	"cmp"
	"context"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// flowTestConfig judges the sensors rp.* on the slope of a line and on
// lead time. The drifting sensor's 4.8 kPa/day is past the critical
// slope of 3 kPa/day and leaves the ±5 kPa band within about a day.
const flowTestConfig = `store:
  commit_interval: 50ms
classes:
  - name: test
    match: ["rp.*"]
    unit: kPa
    span: {lower: 0, upper: 1000}
    tolerance: "5 kPa"
    windows: [{span: 1d, pane: 1h}, {span: 7d, pane: 1d}]
    min_readings: 20
    min_coverage: 0
    debounce: 1
    limits:
      slope: {warning: "1 kPa/day", critical: "3 kPa/day"}
      lead_time: {warning: 2d, critical: 12h}
`

// flowReading is one row of the test's file.
type flowReading struct {
	id string
	rd rolling.Reading
}

// flowTestData returns hourly readings (jittered within the hour) of a
// drifting and a quiet sensor for days days, ending an hour ago, in time
// order, and the time of a calibration of the drifting one after 60% of
// them: it is left at 500 kPa then and drifts on from there.
func flowTestData(t *testing.T, days int) ([]flowReading, time.Time) {
	const seed = 11
	t.Logf("noise seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	end := time.Now().Add(-time.Hour).Truncate(time.Hour)
	start := end.Add(-time.Duration(days) * 24 * time.Hour)
	calAt := start.Add(time.Duration(days*24*6/10)*time.Hour + 30*time.Minute)
	var out []flowReading
	for h := range days * 24 {
		for _, id := range []string{"rp.drift", "rp.quiet"} {
			at := start.Add(time.Duration(h)*time.Hour + time.Duration(rng.Int64N(int64(time.Hour))))
			v := 500 + rng.NormFloat64()
			if id == "rp.drift" {
				from := start
				if !at.Before(calAt) {
					from = calAt
				}
				v += 0.2 * at.Sub(from).Hours() // 4.8 kPa/day
			}
			out = append(out, flowReading{id, rolling.Reading{UnixNano: at.UnixNano(), Value: v}})
		}
	}
	return out, calAt
}

// serveFlowRun feeds rs to the service as serve builds it from cfgPath
// (serviceOptions), over NATS, one reading a message, with the
// calibration of calID sent just before its first reading at or after
// calAt, once every reading before was taken. It returns what `driftfit alerts` and `driftfit tickets` print
// from the state file afterwards (--format json), and every ticket
// revision published on the bus, by its Nats-Msg-Id.
func serveFlowRun(t *testing.T, cfgPath string, rs []flowReading, calID string, calAt time.Time, asFound float64) (events, tickets []string, revisions map[string]string) {
	t.Helper()
	dir := t.TempDir()
	ns := startNATS(t, filepath.Join(dir, "nats"), 0)
	js := readingStream(t, ns.ClientURL())
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	revCh := make(chan *nats.Msg, 1024)
	if _, err := nc.ChanSubscribe("driftfit.tickets", revCh); err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	dbPath := filepath.Join(dir, "serve.db")
	db, err := store.Open(dbPath, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	cfg, err := configs.Load(cfgPath)
	if err != nil {
		t.Fatal(err)
	}
	log := zerolog.New(zerolog.NewTestWriter(t)).Level(zerolog.ErrorLevel)
	opts := serviceOptions(cfg, db, &log, nil)
	opts.Conn = nc
	svc, err := ingest.New(opts)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	waitTaken := func(n int) {
		t.Helper()
		deadline := time.Now().Add(time.Minute)
		for svc.Stats().Messages < uint64(n) {
			if time.Now().After(deadline) {
				t.Fatalf("service took %d of %d messages", svc.Stats().Messages, n)
			}
			time.Sleep(5 * time.Millisecond)
		}
	}
	calibrated := false
	for i, r := range rs {
		if !calibrated && r.id == calID && r.rd.UnixNano >= calAt.UnixNano() {
			waitTaken(i)
			body, _ := json.Marshal(ingest.CalibrationMsg{T: calAt.Format(time.RFC3339Nano), AsFound: asFound, AsLeft: 500})
			reply, err := nc.Request("driftfit.calibrations."+calID, body, 30*time.Second)
			var ans ingest.CalibrationReply
			if err != nil || json.Unmarshal(reply.Data, &ans) != nil || !ans.OK || ans.Record == nil {
				t.Fatalf("calibration reply %v, %v; want ok with the record", reply, err)
			}
			calibrated = true
		}
		if _, err := js.Publish(t.Context(), "driftfit.in."+r.id, ingest.AppendReading(nil, ingest.Decoded{Reading: r.rd})); err != nil {
			t.Fatal(err)
		}
	}
	waitTaken(len(rs))
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	revisions = map[string]string{}
	for drained := false; !drained; {
		select {
		case m := <-revCh:
			revisions[m.Header.Get(nats.MsgIdHdr)] = string(m.Data)
		case <-time.After(200 * time.Millisecond):
			drained = true
		}
	}
	for _, cmd := range []string{"alerts", "tickets"} {
		out, stderr, code := runCmd(t, "", cmd, "--db", dbPath, "--format", "json")
		if code != 0 {
			t.Fatalf("%s: exit %d: %s", cmd, code, stderr)
		}
		if cmd == "alerts" {
			events = lines(out)
		} else {
			tickets = lines(out)
		}
	}
	return events, tickets, revisions
}

// splitAt takes "at" off the front of a replay ticket line.
func splitAt(t *testing.T, line string) (time.Time, string) {
	t.Helper()
	rest, ok := strings.CutPrefix(line, `{"at":"`)
	i := strings.Index(rest, `",`)
	if !ok || i < 0 {
		t.Fatalf("ticket line does not start with \"at\": %s", line)
	}
	at, err := time.Parse(time.RFC3339Nano, rest[:i])
	if err != nil {
		t.Fatalf("ticket line %s: at: %v", line, err)
	}
	return at, "{" + rest[i+2:]
}

// TestReplay_ConfigMatchesServe replays a drifting and a quiet sensor
// under a configuration with limits, with a calibration of the drifting
// one in a calibrations file, and runs the same readings through the
// service fed over NATS as serve runs it. The replay's events must equal
// what `driftfit alerts --format json` prints from serve's state file,
// line for line and byte for byte; its ticket lines, with "at" taken
// off, must equal the revisions serve published (openings) and what
// `driftfit tickets --format json` prints (closings and open tickets).
// No field differs: replay only adds "at" to a ticket line, and orders
// the events of one instant by sensor where serve's order is that of
// its commits. The opening's "at" is the
// reading time of the raise that opened it, the closing's the
// calibration's time from the file.
func TestReplay_ConfigMatchesServe(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the service twice")
	}
	rs, calAt := flowTestData(t, 15)
	events := checkReplayMatchesServe(t, flowTestConfig, rs, "rp.drift", calAt, 543.25, true)
	for _, ev := range events {
		if ev.Sensor != "rp.drift" {
			t.Errorf("event of the quiet sensor: %+v", ev)
		}
	}
}

// checkReplayMatchesServe writes config, rs and a calibration of calID
// to files, runs replay --config on them and serveFlowRun on the same,
// and checks that replay's events and tickets are serve's (see
// TestReplay_ConfigMatchesServe); wantClose asks for a ticket closed by
// the calibration. It returns the events.
func checkReplayMatchesServe(t *testing.T, config string, rs []flowReading, calID string, calAt time.Time, asFound float64, wantClose bool) []alert.Event {
	t.Helper()
	dir := t.TempDir()
	cfgPath := filepath.Join(dir, "driftfit.yaml")
	if err := os.WriteFile(cfgPath, []byte(config), 0o600); err != nil {
		t.Fatal(err)
	}
	var csv strings.Builder
	csv.WriteString("sensor,time,value\n")
	for _, r := range rs {
		// Values in the shortest form that reads back to the same float, as
		// ingest.AppendReading writes them for serve.
		fmt.Fprintf(&csv, "%s,%d.%09d,%s\n", r.id, r.rd.UnixNano/1e9, r.rd.UnixNano%1e9, strconv.FormatFloat(r.rd.Value, 'g', -1, 64))
	}
	csvPath := filepath.Join(dir, "readings.csv")
	calPath := filepath.Join(dir, "calibrations.csv")
	evPath, tkPath := filepath.Join(dir, "events.jsonl"), filepath.Join(dir, "tickets.jsonl")
	if err := os.WriteFile(csvPath, []byte(csv.String()), 0o600); err != nil {
		t.Fatal(err)
	}
	cals := fmt.Sprintf("sensor,time,as_found,as_left\n%s,%s,%v,500\n", calID, calAt.Format(time.RFC3339Nano), asFound)
	if err := os.WriteFile(calPath, []byte(cals), 0o600); err != nil {
		t.Fatal(err)
	}

	_, stderr, code := runCmd(t, "", "replay", "--config", cfgPath, "--calibrations", calPath, "--events", evPath, "--tickets", tkPath, csvPath)
	if code != 0 {
		t.Fatalf("replay: exit %d: %s", code, stderr)
	}
	if !strings.Contains(stderr, "1 calibrations recorded, 0 refused") {
		t.Errorf("replay summary lacks the calibration:\n%s", stderr)
	}
	evBytes, _ := os.ReadFile(evPath)
	tkBytes, _ := os.ReadFile(tkPath)
	gotEvents, gotTickets := lines(string(evBytes)), lines(string(tkBytes))

	wantEvents, wantTickets, revisions := serveFlowRun(t, cfgPath, rs, calID, calAt, asFound)
	// Serve files the events of one instant in the order its commits
	// wrote them, which across sensors is arbitrary; replay puts them in
	// sensor order. That order is the one thing allowed to differ.
	slices.SortStableFunc(wantEvents, func(a, b string) int {
		var ea, eb alert.Event
		if json.Unmarshal([]byte(a), &ea) != nil || json.Unmarshal([]byte(b), &eb) != nil {
			t.Fatalf("serve event lines %s / %s", a, b)
		}
		return cmp.Or(ea.At.Compare(eb.At), strings.Compare(ea.Sensor, eb.Sensor))
	})

	// Events: byte for byte, in the same order (but for the one above).
	if !slices.Equal(gotEvents, wantEvents) {
		t.Errorf("replay events differ from serve's:\n got %d:\n%s\nwant %d:\n%s", len(gotEvents), strings.Join(gotEvents, "\n"),
			len(wantEvents), strings.Join(wantEvents, "\n"))
	}
	type raise struct {
		sensor string
		at     time.Time
	}
	raised := map[raise]bool{}
	var events []alert.Event
	for _, l := range gotEvents {
		var ev alert.Event
		if err := json.Unmarshal([]byte(l), &ev); err != nil {
			t.Fatal(err)
		}
		events = append(events, ev)
		if ev.Type == alert.Raised {
			raised[raise{ev.Sensor, ev.At}] = true
		}
	}
	if !slices.ContainsFunc(events, func(ev alert.Event) bool { return ev.Type == alert.Raised && ev.Sensor == calID }) {
		t.Fatalf("no alert raised on %s", calID)
	}

	// Tickets: every revision serve published, once, in time order.
	latest := map[string]string{}
	for _, l := range wantTickets {
		var tk alert.Ticket
		if err := json.Unmarshal([]byte(l), &tk); err != nil {
			t.Fatal(err)
		}
		latest[tk.ID] = l
	}
	seen := map[string]bool{}
	var prev time.Time
	closedAtCal := false
	for _, l := range gotTickets {
		at, rest := splitAt(t, l)
		if at.Before(prev) {
			t.Errorf("ticket lines out of time order at %s", l)
		}
		prev = at
		var tk alert.Ticket
		if err := json.Unmarshal([]byte(rest), &tk); err != nil {
			t.Fatalf("ticket line %s: %v", l, err)
		}
		rev := ticketRevisionKey(tk)
		seen[rev] = true
		if want, ok := revisions[rev]; !ok || rest != want {
			t.Errorf("replay revision %s:\n got %s\nwant (serve, on the bus) %s", rev, rest, want)
		}
		if tk.Calibration == nil && tk.Revision > 0 {
			if !at.Equal(tk.AsOf) {
				t.Errorf("revision %d of %s at %v, want the time it was estimated %v", tk.Revision, tk.ID, at, tk.AsOf)
			}
			continue
		}
		if tk.Calibration == nil {
			if !at.Equal(tk.Opened) || !raised[raise{tk.Sensor, at}] {
				t.Errorf("opening of %s at %v, want its opened time %v, the time of a raise", tk.ID, at, tk.Opened)
			}
			continue
		}
		if want := latest[tk.ID]; rest != want {
			t.Errorf("closing of %s:\n got %s\nwant (driftfit tickets) %s", tk.ID, rest, want)
		}
		if at.Equal(calAt) && tk.Calibration.Time.Equal(calAt) && tk.Calibration.AsFound == asFound && tk.Calibration.AsLeft == 500 {
			closedAtCal = true
		}
	}
	if wantClose && !closedAtCal {
		t.Errorf("no ticket closed by the file's calibration at %v:\n%s", calAt, strings.Join(gotTickets, "\n"))
	}
	for rev := range revisions {
		if !seen[rev] {
			t.Errorf("serve published revision %s; replay has none", rev)
		}
	}

	// Without --events and --tickets both go to standard output, merged
	// by time.
	stdout, stderr, code := runCmd(t, "", "replay", "--config", cfgPath, "--calibrations", calPath, csvPath)
	if code != 0 {
		t.Fatalf("replay to stdout: exit %d: %s", code, stderr)
	}
	merged := lines(stdout)
	if a, b := slices.Sorted(slices.Values(merged)), slices.Sorted(slices.Values(append(slices.Clone(gotEvents), gotTickets...))); !slices.Equal(a, b) {
		t.Errorf("standard output is not the events and the tickets:\n%s", stdout)
	}
	prev = time.Time{}
	for _, l := range merged {
		var v struct{ At time.Time }
		if err := json.Unmarshal([]byte(l), &v); err != nil || v.At.Before(prev) {
			t.Errorf("merged line out of time order (or without at): %s", l)
		}
		prev = v.At
	}
	return events
}

// ticketRevisionKey is the Nats-Msg-Id serve publishes a revision under
// (ingest's ticketRevisionID: the ticket id, and its closing, opening or
// the number of a due-date revision).
func ticketRevisionKey(tk alert.Ticket) string {
	switch {
	case tk.Calibration != nil:
		return "tk|" + tk.ID + "|closed"
	case tk.Revision == 0:
		return "tk|" + tk.ID + "|opened"
	}
	return "tk|" + tk.ID + "|r" + strconv.Itoa(tk.Revision)
}

// TestReplay_ConfigFlags checks the flags that belong to one mode only.
func TestReplay_ConfigFlags(t *testing.T) {
	dir := t.TempDir()
	cfgPath := filepath.Join(dir, "driftfit.yaml")
	if err := os.WriteFile(cfgPath, []byte(flowTestConfig), 0o600); err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		args []string
		want string
	}{
		{[]string{"replay", "--events", "e.jsonl", "-"}, "--events needs --config"},
		{[]string{"replay", "--calibrations", "c.csv", "-"}, "--calibrations needs --config"},
		{[]string{"replay", "--config", cfgPath, "--window", "1d/1h", "-"}, "--window does not apply with --config"},
		{[]string{"replay", "--config", cfgPath, "--format", "json", "-"}, "--format does not apply with --config"},
		{[]string{"replay", "--config", cfgPath, "--log-level", "loud", "-"}, `--log-level "loud"`},
	}
	for _, tc := range cases {
		_, stderr, code := runCmd(t, "sensor,time,value\n", tc.args...)
		if code != 2 || !strings.Contains(stderr, tc.want) {
			t.Errorf("%v: exit %d, stderr %q, want exit 2 and %q", tc.args, code, stderr, tc.want)
		}
	}
	// --strict ends the run at the first bad row, with its line.
	_, stderr, code := runCmd(t, "sensor,time,value\nrp.a,1772366400,1\nrp.a,soon,2\n", "replay", "--config", cfgPath, "--strict", "-")
	if code != 1 || !strings.Contains(stderr, `line 3: time "soon"`) {
		t.Errorf("--strict: exit %d, stderr %q, want exit 1 naming line 3", code, stderr)
	}
}

// TestReplay_ConfigBadInput checks that bad rows, sensor ids the bus
// cannot carry, readings the service refuses and bad calibration rows
// are each reported with what was wrong and counted, while the good
// readings around them are applied.
func TestReplay_ConfigBadInput(t *testing.T) {
	dir := t.TempDir()
	cfgPath := filepath.Join(dir, "driftfit.yaml")
	if err := os.WriteFile(cfgPath, []byte(flowTestConfig), 0o600); err != nil {
		t.Fatal(err)
	}
	t0 := time.Now().Add(-48 * time.Hour).Truncate(time.Hour)
	future := time.Now().Add(time.Hour)
	var csv bytes.Buffer
	csv.WriteString("sensor,time,value\n")
	good := 0
	for h := range 10 {
		fmt.Fprintf(&csv, "rp.a,%d,%d\n", t0.Add(time.Duration(h)*time.Hour).Unix(), 500+h)
		good++
	}
	csv.WriteString("rp.a,yesterday,1\n")                             // line 12: bad time
	csv.WriteString("rp a,1772366400,1\n")                            // line 13: a space
	csv.WriteString("rp.*,1772366400,1\n")                            // line 14: a wildcard
	fmt.Fprintf(&csv, "rp.a,%d,1\n", future.Unix())                   // line 15: future, refused by the service
	fmt.Fprintf(&csv, "rp.a,%d,1\n", t0.Add(-30*24*time.Hour).Unix()) // line 16: older than every window
	cals := "sensor,time,as_found,as_left\nrp.a,soon,1,2\nrp.nobody," + t0.Format(time.RFC3339) + ",1,2\n"
	calPath := filepath.Join(dir, "cal.csv")
	if err := os.WriteFile(calPath, []byte(cals), 0o600); err != nil {
		t.Fatal(err)
	}
	_, stderr, code := runCmd(t, csv.String(), "replay", "--config", cfgPath, "--calibrations", calPath, "--events", filepath.Join(dir, "e"), "--tickets", filepath.Join(dir, "t"), "-")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	for _, want := range []string{
		`line 12: time "yesterday"`,
		`line 13: sensor "rp a": not a sensor id the bus can carry: a space or control character`,
		`line 14: sensor "rp.*": not a sensor id the bus can carry: the wildcard *`,
		`calibrations line 2: time "soon"`,
		`calibrations line 3: sensor "rp.nobody"`,
		"future_time",
		"too_old",
		fmt.Sprintf("%d readings published, %d applied, 2 refused by the service", good+2, good),
		"15 rows (3 bad)",
		"0 calibrations recorded, 1 refused",
	} {
		if !strings.Contains(stderr, want) {
			t.Errorf("stderr lacks %q:\n%s", want, stderr)
		}
	}
}

// TestReplay_ConfigPeerGroupMatchesServe runs a peer group of three
// through both: a shared daily swing of ±3 kPa and a 5 kPa step on day
// 6 move every member, one member drifts at 4.8 kPa/day and is
// calibrated on day 9. Each member reports twice an hour, its two
// readings one after the other in the file, so replay sends them as one
// message where serve's feed sends two: the group's members keep their
// order, and the events and tickets must be the same.
func TestReplay_ConfigPeerGroupMatchesServe(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the service twice")
	}
	config := strings.Replace(flowTestConfig, `match: ["rp.*"]`, `match: ["rp.g?"]`, 1) + `groups:
  - name: header
    members: ["rp.g?"]
`
	const seed, days = 12, 15
	t.Logf("noise seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	end := time.Now().Add(-time.Hour).Truncate(time.Hour)
	start := end.Add(-days * 24 * time.Hour)
	calAt := start.Add(9*24*time.Hour + 45*time.Minute)
	var rs []flowReading
	for h := range days * 24 {
		for k, id := range []string{"rp.g1", "rp.g2", "rp.g3"} {
			for j := range 2 {
				at := start.Add(time.Duration(h)*time.Hour + time.Duration(2*k+j)*10*time.Minute + time.Duration(rng.Int64N(int64(10*time.Minute))))
				hours := at.Sub(start).Hours()
				v := 500 + 3*math.Sin(2*math.Pi*hours/24) + 0.3*rng.NormFloat64()
				if hours >= 6*24 {
					v += 5
				}
				if id == "rp.g1" {
					from := start
					if !at.Before(calAt) {
						from = calAt
					}
					v += 0.2 * at.Sub(from).Hours()
				}
				rs = append(rs, flowReading{id, rolling.Reading{UnixNano: at.UnixNano(), Value: v}})
			}
		}
	}
	checkReplayMatchesServe(t, config, rs, "rp.g1", calAt, 521.5, false)
}

// TestReplay_ConfigSmallPayloadLimit checks that replay's batches keep
// to bus.max_payload_bytes: with 300 bytes a message holds at most 4
// readings (56 bytes each at worst, see batchReadingBytes), and the
// service refuses none as oversized.
func TestReplay_ConfigSmallPayloadLimit(t *testing.T) {
	dir := t.TempDir()
	cfgPath := filepath.Join(dir, "driftfit.yaml")
	if err := os.WriteFile(cfgPath, []byte("bus:\n  max_payload_bytes: 300\n"+flowTestConfig), 0o600); err != nil {
		t.Fatal(err)
	}
	t0 := time.Now().Add(-10 * 24 * time.Hour).Truncate(time.Hour)
	var csv strings.Builder
	csv.WriteString("sensor,time,value\n")
	for h := range 200 {
		// Values printed in full (17 significant digits) make batches
		// near the worst case.
		fmt.Fprintf(&csv, "rp.a,%d.123456789,%s\n", t0.Add(time.Duration(h)*time.Hour).Unix(), strconv.FormatFloat(-1.0/3-float64(h)*1e-13, 'g', -1, 64))
	}
	_, stderr, code := runCmd(t, csv.String(), "replay", "--config", cfgPath, "--events", filepath.Join(dir, "e"), "--tickets", filepath.Join(dir, "t"), "-")
	if code != 0 || !strings.Contains(stderr, "200 readings published, 200 applied, 0 refused by the service") {
		t.Errorf("exit %d, stderr:\n%s\nwant all 200 readings applied", code, stderr)
	}
}
