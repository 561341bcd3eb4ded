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
)

// TestBench_SmallRun runs the whole command on a small fleet and checks
// that every phase measured something and that the derived numbers follow
// from the measured ones by the arithmetic written here.
func TestBench_SmallRun(t *testing.T) {
	if testing.Short() {
		t.Skip("runs NATS, bbolt and every phase for a few seconds")
	}
	var out, errs bytes.Buffer
	err := runBench(t.Context(), []string{"--duration", "2s", "--sensors", "300", "--sensors-max", "2000", "--json"}, nil, &out, &errs)
	if err != nil {
		t.Fatalf("bench: %v\n%s", err, errs.String())
	}
	var rep benchReport
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
	for _, want := range []string{"direct 1/msg", "direct 100/msg", "stream 100/msg"} {
		if !cases[want] {
			t.Errorf("case %q missing from %v", want, cases)
		}
	}
	if l := rep.Latency; l.Samples == 0 || !(l.P50Ms <= l.P99Ms && l.P99Ms <= l.MaxMs) || l.P50Ms <= 0 {
		t.Errorf("latency %+v: want samples and 0 < p50 <= p99 <= max", l)
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

// TestBenchReport_Check: the command fails on a phase that applied
// nothing or a number that is not finite, and never on speed.
func TestBenchReport_Check(t *testing.T) {
	good := func() benchReport {
		return benchReport{
			Throughput: []benchThroughput{{Case: "direct 1/msg", Readings: 10, AppliedPerSec: 1, BaselinePerSec: 1000, Ratio: 0.001}},
			Latency:    benchLatency{Samples: 1, P50Ms: 900, P99Ms: 900, MaxMs: 900},
			Fleets:     []benchFleet{{Sensors: 10, Commits: 1, RestoreMs: 1e6}},
		}
	}
	for _, tc := range []struct {
		name   string
		change func(*benchReport)
		want   string // "" for no error
	}{
		{"slow but sane", func(*benchReport) {}, ""},
		{"nothing applied", func(r *benchReport) { r.Throughput[0].Readings = 0 }, "no reading applied"},
		{"baseline empty", func(r *benchReport) { r.Throughput[0].BaselinePerSec = 0 }, "baseline received nothing"},
		{"NaN ratio", func(r *benchReport) { r.Throughput[0].Ratio = math.NaN() }, "NaN"},
		{"no probe", func(r *benchReport) { r.Latency.Samples = 0 }, "no probe"},
		{"infinite latency", func(r *benchReport) { r.Latency.P99Ms = math.Inf(1) }, "+Inf"},
		{"fleet without commits", func(r *benchReport) { r.Fleets[0].Commits = 0 }, "no commit"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := good()
			tc.change(&r)
			err := r.check()
			switch {
			case tc.want == "" && err != nil:
				t.Errorf("check() = %v, want nil", err)
			case tc.want != "" && (err == nil || !strings.Contains(err.Error(), tc.want)):
				t.Errorf("check() = %v, want an error containing %q", err, tc.want)
			}
		})
	}
}

func TestGrouped(t *testing.T) {
	for _, tc := range []struct {
		v    float64
		want string
	}{{0, "0"}, {999.4, "999"}, {1000, "1,000"}, {1234567.6, "1,234,568"}, {-45000, "-45,000"}} {
		if got := grouped(tc.v); got != tc.want {
			t.Errorf("grouped(%v) = %q, want %q", tc.v, got, tc.want)
		}
	}
}
