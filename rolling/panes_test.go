package rolling_test

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"driftfit/rolling"
)

// paneRef is one pane's statistics computed here from the readings
// themselves: sums in the order the readings came, nothing shared with
// rolling's pane sums.
type paneRef struct {
	start, first, last int64
	n, npos            int
	sumY, sumLn        float64
	sumOff, sumOffPos  int64 // Σ(t − start) in ns
	offs               []float64
	maxAbs             float64
}

// paneRefs groups readings by pane index of width w.
func paneRefs(rs []rolling.Reading, w time.Duration) map[int64]*paneRef {
	out := map[int64]*paneRef{}
	for _, r := range rs {
		k := r.UnixNano / int64(w) // times here are after the epoch
		p := out[k]
		if p == nil {
			p = &paneRef{start: k * int64(w), first: r.UnixNano, last: r.UnixNano}
			out[k] = p
		}
		p.first, p.last = min(p.first, r.UnixNano), max(p.last, r.UnixNano)
		p.n++
		p.sumY += r.Value
		p.maxAbs = max(p.maxAbs, math.Abs(r.Value))
		off := r.UnixNano - p.start
		p.sumOff += off
		p.offs = append(p.offs, float64(off))
		if r.Value > 0 {
			p.npos++
			p.sumLn += math.Log(r.Value)
			p.sumOffPos += off
		}
	}
	return out
}

// TestSensor_AppendPanes checks the statistics of the panes held against the
// same statistics computed here from the readings fed: counts, the mean
// value (naive summation, whose rounding error is at most n·ε·Σ|y|,
// Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., §4.2,
// which sets the tolerance), mean time, the standard deviation of the
// times (two-pass), and the mean ln y and mean time of the positive
// readings. Readings come out of order within panes (some before the
// pane's first reading, which re-anchors its sums), at a level of 10⁶
// with noise of 10⁻³ for one sensor, and around zero for the other, so
// that panes mix readings ≤ 0 with positive ones. The statistics must
// also survive the pane encoding (AppendPane, LoadPane).
func TestSensor_AppendPanes(t *testing.T) {
	specs := []rolling.WindowSpec{
		{Span: 24 * time.Hour, Pane: time.Hour},
		{Span: 6 * time.Hour, Pane: time.Hour}, // shares the hourly ring
		{Span: 5 * 24 * time.Hour, Pane: 24 * time.Hour},
	}
	const seed = 7
	t.Logf("seed %d", seed)
	t0 := time.Date(2026, 11, 2, 0, 0, 0, 0, time.UTC).UnixNano()
	for _, c := range []struct {
		name  string
		value func(rng *rand.Rand, days float64) float64
	}{
		{"high level, small noise", func(rng *rand.Rand, d float64) float64 { return 1e6 + 0.002*d + 1e-3*rng.NormFloat64() }},
		{"around zero", func(rng *rand.Rand, d float64) float64 { return 0.3 + 0.1*d + rng.NormFloat64() }},
	} {
		t.Run(c.name, func(t *testing.T) {
			rng := rand.New(rand.NewPCG(seed, 1))
			s := newSensor(t, specs...)
			var fed []rolling.Reading
			var keys []rolling.PaneKey
			seen := map[rolling.PaneKey]bool{}
			at := t0 + int64(13*time.Minute)
			for at < t0+int64(8*24*time.Hour) {
				at += int64(time.Duration(3+rng.IntN(9)) * time.Minute)
				batch := []rolling.Reading{{UnixNano: at, Value: c.value(rng, float64(at-t0)/86400e9)}}
				if rng.IntN(7) == 0 {
					// A late reading in the same hour, before the one
					// just made and possibly before the pane's first.
					h := at - at%int64(time.Hour)
					back := h + rng.Int64N(at-h+1)
					batch = append(batch, rolling.Reading{UnixNano: back, Value: c.value(rng, float64(back-t0)/86400e9)})
				}
				for _, r := range batch {
					if err := s.Add(r); err != nil {
						t.Fatalf("Add(%v): %v", r, err)
					}
					fed = append(fed, r)
					for _, w := range []time.Duration{time.Hour, 24 * time.Hour} {
						k := rolling.PaneKey{Width: w, Index: r.UnixNano / int64(w)}
						if !seen[k] {
							seen[k] = true
							keys = append(keys, k)
						}
					}
				}
			}
			for name, sensor := range map[string]*rolling.Sensor{"fed": s, "restored": copyState3(t, s, specs, keys)} {
				// The hourly ring holds the 24 panes of the longer hourly
				// window, the shorter one's among them.
				checkPanes(t, name, sensor, time.Hour, 24, fed)
				checkPanes(t, name, sensor, 24*time.Hour, 5, fed)
				if got := sensor.AppendPanes(nil, time.Minute); len(got) != 0 {
					t.Errorf("%s: %d panes of a width no window has", name, len(got))
				}
			}
		})
	}
}

// copyState3 is copyState for sensors of other windows.
func copyState3(t *testing.T, src *rolling.Sensor, specs []rolling.WindowSpec, keys []rolling.PaneKey) *rolling.Sensor {
	t.Helper()
	dst := newSensor(t, specs...)
	for _, w := range []time.Duration{time.Hour, 24 * time.Hour} {
		for _, k := range keys { // in the order first seen: increasing per width
			if k.Width != w {
				continue
			}
			if data := src.AppendPane(nil, k); len(data) > 0 {
				if err := dst.LoadPane(k, data); err != nil {
					t.Fatalf("LoadPane(%v): %v", k, err)
				}
			}
		}
	}
	return dst
}

// checkPanes checks the panes of width w, held panes of them.
func checkPanes(t *testing.T, name string, s *rolling.Sensor, w time.Duration, held int, fed []rolling.Reading) {
	t.Helper()
	refs := paneRefs(fed, w)
	var newest int64
	for k := range refs {
		newest = max(newest, k)
	}
	got := s.AppendPanes(nil, w)
	var want []int64
	for k := newest - int64(held) + 1; k <= newest; k++ {
		if refs[k] != nil {
			want = append(want, k)
		}
	}
	if len(got) != len(want) {
		t.Fatalf("%s width %v: %d panes, want %d", name, w, len(got), len(want))
	}
	const eps = 0x1p-52
	for j, k := range want {
		p, r := got[j], refs[k]
		where := func() string {
			return name + " width " + fmt.Sprint(w) + " pane " + p.Start.UTC().Format(time.RFC3339)
		}
		if !p.Start.Equal(time.Unix(0, r.start)) || !p.End.Equal(time.Unix(0, r.start+int64(w))) ||
			p.First.UnixNano() != r.first || p.Last.UnixNano() != r.last || p.N != r.n || p.NPos != r.npos {
			t.Fatalf("%s: start %v end %v first %v last %v n %d npos %d, want start %v first %v last %v n %d npos %d", where(),
				p.Start, p.End, p.First, p.Last, p.N, p.NPos, time.Unix(0, r.start), time.Unix(0, r.first), time.Unix(0, r.last), r.n, r.npos)
		}
		n := float64(r.n)
		mean := r.sumY / n
		if tol := 4 * n * eps * r.maxAbs; math.Abs(p.Mean-mean) > tol {
			t.Errorf("%s: mean %.17g, want %.17g (tolerance %.3g)", where(), p.Mean, mean, tol)
		}
		mt := float64(r.sumOff) / n
		if d := float64(p.MeanTime.UnixNano()-r.start) - mt; math.Abs(d) > 10 {
			t.Errorf("%s: mean time off by %.1f ns", where(), d)
		}
		var ss float64
		for _, o := range r.offs {
			ss += (o - mt) * (o - mt)
		}
		sd := math.Sqrt(ss / n)
		if d := float64(p.TimeSD) - sd; math.Abs(d) > 10+1e-9*sd {
			t.Errorf("%s: time SD %v, want %.0f ns", where(), p.TimeSD, sd)
		}
		if r.npos == 0 {
			if p.LogMean != 0 || !p.MeanTimePos.IsZero() {
				t.Errorf("%s: no positive readings, yet log mean %v, mean time %v", where(), p.LogMean, p.MeanTimePos)
			}
			continue
		}
		np := float64(r.npos)
		if lm := r.sumLn / np; math.Abs(p.LogMean-lm) > 1e-12*math.Max(1, math.Abs(lm)) {
			t.Errorf("%s: log mean %.17g, want %.17g", where(), p.LogMean, lm)
		}
		if d := float64(p.MeanTimePos.UnixNano()-r.start) - float64(r.sumOffPos)/np; math.Abs(d) > 10 {
			t.Errorf("%s: mean time of the positive readings off by %.1f ns", where(), d)
		}
	}
}
