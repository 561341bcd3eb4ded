package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"io"
	"math"
	"strings"
	"testing"

	"driftfit/cmd/driftfit/internal/bench"
)

// TestBench_SmallRun runs the whole command on a small fleet and checks
// that every phase measured something and that the derived numbers follow
// from the measured ones by the arithmetic written here.
func TestBench_SmallRun(t *testing.T) {
	if testing.Short() {
		t.Skip("runs NATS, bbolt and every phase for a few seconds")
	}
	var out, errs bytes.Buffer
	// 4 s: each timed phase gets a few hundred ms even under -race on a
	// loaded machine, so "no reading applied" means a fault, not a slow run.
	err := runBench(t.Context(), []string{"--duration", "4s", "--sensors", "300", "--sensors-max", "2000", "--json"}, nil, &out, &errs)
	if err != nil {
		t.Fatalf("bench: %v\n%s", err, errs.String())
	}
	var rep bench.Report
	if err := json.Unmarshal(out.Bytes(), &rep); err != nil {
		t.Fatalf("bench --json output does not decode: %v\n%s", err, out.String())
	}
	cases := map[string]bool{}
	for _, c := range rep.Throughput {
		cases[c.Case] = true
		if c.Readings == 0 || c.AppliedPerSec <= 0 || c.BaselinePerSec <= 0 {
			t.Errorf("%s: applied %d (%v/s), baseline %v/s; want all > 0", c.Case, c.Readings, c.AppliedPerSec, c.BaselinePerSec)
		}
		// ratio = applied/s ÷ baseline/s; applied/s = readings ÷ seconds.
		if want := c.AppliedPerSec / c.BaselinePerSec; math.Abs(c.Ratio-want) > 1e-9*want {
			t.Errorf("%s: ratio %v, want %v", c.Case, c.Ratio, want)
		}
		if want := float64(c.Readings) / c.Seconds; math.Abs(c.AppliedPerSec-want) > 1e-9*want {
			t.Errorf("%s: applied/s %v, want %v", c.Case, c.AppliedPerSec, want)
		}
		// Committing follows applying, so it cannot be faster.
		if c.CommittedPerSec > c.AppliedPerSec {
			t.Errorf("%s: committed/s %v above applied/s %v", c.Case, c.CommittedPerSec, c.AppliedPerSec)
		}
		if c.Readings%uint64(c.PerMessage) != 0 {
			t.Errorf("%s: %d readings is not a whole count of %d-reading messages", c.Case, c.Readings, c.PerMessage)
		}
	}
	for _, want := range []string{"direct 1/msg", "direct 1/msg frequent", "direct 100/msg", "stream 100/msg"} {
		if !cases[want] {
			t.Errorf("case %q missing from %v", want, cases)
		}
	}
	// The frequent case repeats direct 1/msg with other commit settings
	// against the same baseline.
	if d, fr := rep.Throughput[0], rep.Throughput[1]; fr.BaselinePerSec != d.BaselinePerSec || fr.Commit == d.Commit {
		t.Errorf("frequent case %+v against %+v: want the same baseline and other commit settings", fr, d)
	}
	if l := rep.Latency; l.Samples == 0 || !(l.P50Ms <= l.P99Ms && l.P99Ms <= l.MaxMs) || l.P50Ms <= 0 {
		t.Errorf("latency %+v: want samples and 0 < p50 <= p99 <= max", l)
	}
	if len(rep.Alerts) != 4 || rep.Alerts[0].Sensors != 300 || rep.Alerts[3].Sensors != 2000 {
		t.Fatalf("alert latency %+v: want an idle and a loaded run at 300 and at 2,000 sensors", rep.Alerts)
	}
	for _, a := range rep.Alerts {
		// Every probe crosses the limit with its fourth reading, whatever
		// the load, and is judged at the next pane close.
		if a.Probes == 0 || a.Raised != a.Probes || a.OffPane != 0 || a.Interval != "1s" {
			t.Errorf("alerts %s: %d probes, %d raised, %d off pane, interval %s; want every probe raised at its first pane close, interval 1s",
				a.Load, a.Probes, a.Raised, a.OffPane, a.Interval)
		}
		if !(0 < a.CloseP50Ms && a.CloseP50Ms <= a.CloseP99Ms && a.CloseP99Ms <= a.CloseMaxMs) {
			t.Errorf("alerts %s: close→alert %v/%v/%v ms, want 0 < p50 <= p99 <= max", a.Load, a.CloseP50Ms, a.CloseP99Ms, a.CloseMaxMs)
		}
		// The crossing reading precedes the closing one, so each probe's
		// cross→alert is at least its close→alert, and the same holds for
		// every order statistic: the k-th smallest of n values each at
		// least its partner is at least the partner's k-th smallest.
		if a.CrossP50Ms < a.CloseP50Ms || a.CrossP99Ms < a.CloseP99Ms || a.CrossMaxMs < a.CloseMaxMs {
			t.Errorf("alerts %s: cross→alert %v/%v/%v ms below close→alert %v/%v/%v ms",
				a.Load, a.CrossP50Ms, a.CrossP99Ms, a.CrossMaxMs, a.CloseP50Ms, a.CloseP99Ms, a.CloseMaxMs)
		}
	}
	if len(rep.Fleets) != 1 || rep.Fleets[0].Sensors != 2000 {
		t.Fatalf("fleets %+v, want one of 2000 sensors", rep.Fleets)
	}
	// 30 daily panes and 24 hourly panes: the default windows 30d/1d and 1d/1h.
	if f := rep.Fleets[0]; f.PanesPerSensor != 54 || f.Commits == 0 || f.RestoreMs <= 0 || f.HeapPerSensor <= 0 {
		t.Errorf("fleet %+v: want 54 panes a sensor, commits, restore time and heap", f)
	}
}

func TestBench_Flags(t *testing.T) {
	for _, tc := range []struct {
		name string
		args []string
		want string
	}{
		{"short duration", []string{"--duration", "10ms"}, "--duration"},
		{"no sensors", []string{"--sensors", "0"}, "--sensors"},
		{"negative fleet", []string{"--sensors-max", "-1"}, "--sensors-max"},
		{"argument", []string{"extra"}, "unexpected"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			err := runBench(context.Background(), tc.args, nil, io.Discard, io.Discard)
			if !errors.Is(err, errUsage) || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("runBench(%q) = %v, want a usage error naming %s", tc.args, err, tc.want)
			}
		})
	}
	if err := runBench(context.Background(), []string{"-h"}, nil, io.Discard, io.Discard); !errors.Is(err, flag.ErrHelp) {
		t.Errorf("runBench(-h) = %v, want flag.ErrHelp", err)
	}
}
