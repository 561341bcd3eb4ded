package bench

import (
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"driftfit/rolling"
)

// TestBenchReport_Check: the command fails on a phase that applied
// nothing or a number that is not finite, and never on speed.
func TestBenchReport_Check(t *testing.T) {
	good := func() Report {
		return Report{
			Throughput: []benchThroughput{{Case: "direct 1/msg", Readings: 10, AppliedPerSec: 1, BaselinePerSec: 1000, Ratio: 0.001}},
			Latency:    benchLatency{Samples: 1, P50Ms: 900, P99Ms: 900, MaxMs: 900},
			Alerts:     []benchAlert{{Sensors: 10, Load: "idle", Probes: 5, Raised: 5, CloseP50Ms: 1, CloseP99Ms: 2, CloseMaxMs: 2}},
			Fleets:     []benchFleet{{Sensors: 10, Commits: 1, RestoreMs: 1e6}},
		}
	}
	for _, tc := range []struct {
		name   string
		change func(*Report)
		want   string // "" for no error
	}{
		{"slow but sane", func(*Report) {}, ""},
		{"nothing applied", func(r *Report) { r.Throughput[0].Readings = 0 }, "no reading applied"},
		{"baseline empty", func(r *Report) { r.Throughput[0].BaselinePerSec = 0 }, "baseline received nothing"},
		{"NaN ratio", func(r *Report) { r.Throughput[0].Ratio = math.NaN() }, "NaN"},
		{"no probe", func(r *Report) { r.Latency.Samples = 0 }, "no probe"},
		{"infinite latency", func(r *Report) { r.Latency.P99Ms = math.Inf(1) }, "+Inf"},
		{"fleet without commits", func(r *Report) { r.Fleets[0].Commits = 0 }, "no commit"},
		{"late alerts are sane", func(r *Report) { r.Alerts[0].CloseP99Ms = 5000 }, ""},
		{"no alert", func(r *Report) { r.Alerts[0].Raised = 0 }, "5 of 5 probes raised no alert"},
		{"one probe not raised", func(r *Report) { r.Alerts[0].Raised = 4 }, "1 of 5 probes raised no alert"},
		{"NaN alert latency", func(r *Report) { r.Alerts[0].CrossP50Ms = math.NaN() }, "alert latency, idle, 10 sensors: a result is NaN"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := good()
			tc.change(&r)
			err := r.Check()
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

// TestProbeLatency checks the matching of a raised event to the reading
// that closed the pane it judged, on hand-worked times. Panes are 1 s
// wide and aligned to the Unix epoch, so the pane of a time t is
// [t − t mod 1 s, +1 s); b is 1,000 s after the epoch, a pane start.
func TestProbeLatency(t *testing.T) {
	const b = int64(1000 * time.Second)
	ms := func(n int64) int64 { return b + n*int64(time.Millisecond) }
	for _, tc := range []struct {
		name              string
		stamps            []int64
		cross             int
		last, recv        int64
		fromClose, fromCx time.Duration
		off, ok           bool
	}{
		{
			// Crossing at b+950 ms in pane [b, b+1 s); the first reading at
			// or after b+1 s (b+1,050 ms) closes it; received at b+1,150 ms:
			// 1,150 − 1,050 = 100 ms and 1,150 − 950 = 200 ms.
			name:   "first close after the crossing",
			stamps: []int64{ms(700), ms(800), ms(900), ms(950), ms(1050), ms(1060)},
			cross:  3, last: ms(950), recv: ms(1150),
			fromClose: 100 * time.Millisecond, fromCx: 200 * time.Millisecond, ok: true,
		},
		{
			// A reading exactly at b+1 s is the first of the next pane, so
			// it is the closing one: 1,030 − 1,000 = 30 ms.
			name:   "closing reading on the boundary",
			stamps: []int64{ms(700), ms(800), ms(900), ms(950), ms(1000)},
			cross:  3, last: ms(950), recv: ms(1030),
			fromClose: 30 * time.Millisecond, fromCx: 80 * time.Millisecond, ok: true,
		},
		{
			// Judged pane [b+1 s, b+2 s), closed by b+2,010 ms; the crossing
			// at b+950 ms lies a pane earlier: 2,100 − 2,010 = 90 ms and
			// 2,100 − 950 = 1,150 ms.
			name:   "a pane close late",
			stamps: []int64{ms(700), ms(800), ms(900), ms(950), ms(1500), ms(1990), ms(2010)},
			cross:  3, last: ms(1990), recv: ms(2100),
			fromClose: 90 * time.Millisecond, fromCx: 1150 * time.Millisecond, off: true, ok: true,
		},
		{
			name:   "judged pane ended before the crossing",
			stamps: []int64{ms(700), ms(800), ms(1100), ms(1200), ms(2100)},
			cross:  3, last: ms(800), recv: ms(1300),
		},
		{
			name:   "no reading closed the pane",
			stamps: []int64{ms(700), ms(800), ms(900), ms(950)},
			cross:  3, last: ms(950), recv: ms(1300),
		},
		{
			name:   "too few readings to cross",
			stamps: []int64{ms(700), ms(800)},
			cross:  3, last: ms(800), recv: ms(1300),
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c, x, off, ok := probeLatency(tc.stamps, tc.cross, tc.last, tc.recv, time.Second)
			if ok != tc.ok || (ok && (c != tc.fromClose || x != tc.fromCx || off != tc.off)) {
				t.Errorf("probeLatency = %v, %v, off %v, ok %v; want %v, %v, off %v, ok %v", c, x, off, ok, tc.fromClose, tc.fromCx, tc.off, tc.ok)
			}
		})
	}
}

// TestProbeLatency_ClosingReadingAsRolling checks that the reading
// probeLatency takes as closing the judged pane is the one on which
// rolling.Sensor reports a pane close, for readings every 37 ms over
// three panes.
func TestProbeLatency_ClosingReadingAsRolling(t *testing.T) {
	s, err := rolling.NewSensor(rolling.WindowSpec{Span: 2 * time.Minute, Pane: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	const b = int64(1000 * time.Second)
	var stamps []int64
	for at := b + int64(13*time.Millisecond); at < b+int64(3*time.Second); at += int64(37 * time.Millisecond) {
		stamps = append(stamps, at)
	}
	for i, at := range stamps {
		if s.Closes(at) != 0 {
			// The judged fit's newest reading is the one before.
			c, _, _, ok := probeLatency(stamps, 0, stamps[i-1], at, time.Second)
			if !ok || c != 0 {
				t.Errorf("reading %d at %d closes a pane in rolling; probeLatency takes another (from close %v, ok %v)", i, at, c, ok)
			}
		}
		if err := s.Add(rolling.Reading{UnixNano: at, Value: 1}); err != nil {
			t.Fatal(err)
		}
	}
}

// TestQuantilesMs: samples 1, 2, …, 100 ms, shuffled with a fixed seed.
// Rank ⌊q·(n−1)⌋ of the sorted samples: ⌊0.5·99⌋ = 49 is 50 ms,
// ⌊0.99·99⌋ = 98 is 99 ms, and the maximum 100 ms. For n = 100 these are
// also the type 1 quantiles of Hyndman and Fan (1996), x(⌈n·q⌉):
// x(50) and x(99).
func TestQuantilesMs(t *testing.T) {
	ds := make([]time.Duration, 100)
	for i := range ds {
		ds[i] = time.Duration(i+1) * time.Millisecond
	}
	const seed = 5
	t.Logf("shuffle seed %d", seed)
	rand.New(rand.NewPCG(seed, seed)).Shuffle(len(ds), func(i, j int) { ds[i], ds[j] = ds[j], ds[i] })
	p50, p99, mx := quantilesMs(ds)
	if p50 != 50 || p99 != 99 || mx != 100 {
		t.Errorf("quantilesMs(1..100 ms) = %v, %v, %v; want 50, 99, 100", p50, p99, mx)
	}
	if p50, p99, mx := quantilesMs(nil); p50 != 0 || p99 != 0 || mx != 0 {
		t.Errorf("quantilesMs(nil) = %v, %v, %v; want zeros", p50, p99, mx)
	}
}
