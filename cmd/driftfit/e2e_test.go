package main

import (
	"bufio"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"
)

// TestServe_HistoryMatchesReplay publishes a known stream to a NATS
// server, lets a driftfit serve process fit it, then compares the last
// fit-history record of each sensor (printed by "driftfit history") with
// "driftfit replay" of the same readings: the JSON lines must be identical.
// The last reading of each sensor lies in a later pane, so it closes the
// pane and the record holds every reading before it.
func TestServe_HistoryMatchesReplay(t *testing.T) {
	if testing.Short() {
		t.Skip("starts a driftfit process")
	}
	dir := t.TempDir()
	ns := startNATS(t, filepath.Join(dir, "nats"), 0)
	cfg := testConfig(t, dir, ns.ClientURL(), "stream")
	js := readingStream(t, ns.ClientURL())
	ctx := t.Context()

	seed := uint64(11)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	ids := []string{"crash.e2e-a", "crash.e2e-b", "crash.e2e-c"}
	end := time.Now().Add(-5 * time.Hour).Truncate(time.Hour)
	var csv strings.Builder
	csv.WriteString("sensor,time,value\n")
	publish := func(id string, at time.Time, v float64) {
		t.Helper()
		payload := fmt.Appendf(nil, `{"t":"%s","v":%v}`, at.UTC().Format(time.RFC3339Nano), v)
		if _, err := js.Publish(ctx, "driftfit.in."+id, payload); err != nil {
			t.Fatal(err)
		}
	}
	for j := range 300 {
		for k, id := range ids {
			at := end.Add(-time.Duration(300-j)*10*time.Minute + time.Duration(rng.IntN(600))*time.Second)
			v := 100*float64(k+1) + 0.002*float64(j) + rng.NormFloat64()
			publish(id, at, v)
			fmt.Fprintf(&csv, "%s,%s,%v\n", id, at.UTC().Format(time.RFC3339Nano), v)
		}
	}
	for _, id := range ids {
		publish(id, end.Add(2*time.Hour), 1) // the closer, not in the CSV
	}

	logPath := filepath.Join(dir, "serve.log")
	started := time.Now()
	c := startChild(t, logPath, "serve", "--config", cfg, "--http-addr", "off", "--log-level", "warn")
	waitCaughtUp(t, js, started, logPath)
	// While serve holds the file, history asks it over the bus.
	db := filepath.Join(dir, "data", dbFile)
	live := map[string]string{}
	for _, id := range ids {
		out, stderr, code := runCmd(t, "", "history", id, "--db", db, "--servers", ns.ClientURL(), "--format", "json")
		if code != 0 {
			t.Fatalf("history %s while serving: exit %d: %s", id, code, stderr)
		}
		live[id] = out
	}
	// The alert listings answer through the service too (this class has
	// no limits, so they are empty).
	for _, cmd := range []string{"alerts", "tickets"} {
		if out, stderr, code := runCmd(t, "", cmd, "--db", db, "--servers", ns.ClientURL(), "--format", "json"); code != 0 || out != "" {
			t.Errorf("%s while serving: exit %d, out %q, stderr %s", cmd, code, out, stderr)
		}
	}
	if err := c.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	if err := <-c.done; err != nil {
		t.Fatalf("serve: %v; log:\n%s", err, readTail(logPath))
	}
	for _, id := range ids {
		out, stderr, code := runCmd(t, "", "history", id, "--db", db, "--format", "json")
		if code != 0 || out != live[id] {
			t.Errorf("history %s from the file (exit %d, %s) differs from the service's answer:\n%s\nvs\n%s", id, code, stderr, out, live[id])
		}
	}

	replayOut, stderr, code := runCmd(t, csv.String(), "replay", "--window", "1d/1h", "--format", "json", "-")
	if code != 0 {
		t.Fatalf("replay exit %d: %s", code, stderr)
	}
	want := map[string][]string{}
	sc := bufio.NewScanner(strings.NewReader(replayOut))
	for sc.Scan() {
		id := strings.SplitN(strings.TrimPrefix(sc.Text(), `{"sensor":"`), `"`, 2)[0]
		want[id] = append(want[id], sc.Text())
	}
	for _, id := range ids {
		out, stderr, code := runCmd(t, "", "history", id, "--db", db, "--window", "1d/1h", "--format", "json")
		if code != 0 {
			t.Fatalf("history %s exit %d: %s", id, code, stderr)
		}
		lines := strings.Split(strings.TrimSpace(out), "\n")
		if len(lines) < 3 {
			t.Fatalf("history %s: %d lines", id, len(lines))
		}
		last := lines[len(lines)-3:]
		for i := range last {
			if last[i] != want[id][i] {
				t.Errorf("%s model %d:\nhistory %s\nreplay  %s", id, i, last[i], want[id][i])
			}
		}
	}
	_ = os.Remove(logPath)
}
