package alert_test

import (
	"errors"
	"math"
	"math/rand/v2"
	"sort"
	"testing"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
)

// refDeviation is the definition written out: copy the other live
// values, sort them with the standard library, take the middle one (or
// the mean of the middle two).
func refDeviation(vals []float64, live []bool, i int) (float64, int) {
	var others []float64
	for j, v := range vals {
		if j != i && live[j] {
			others = append(others, v)
		}
	}
	if len(others) == 0 {
		return vals[i], 0
	}
	sort.Float64s(others)
	n := len(others)
	med := others[n/2]
	if n%2 == 0 {
		med = (others[n/2-1] + others[n/2]) / 2
	}
	return vals[i] - med, n
}

func TestDeviations_MatchesSortedMedian(t *testing.T) {
	const seed = 7
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	var dst []alert.Deviation
	for trial := range 2000 {
		m := 1 + rng.IntN(9)
		vals, live := make([]float64, m), make([]bool, m)
		for j := range vals {
			vals[j] = math.Round(rng.NormFloat64()*4) / 2 // ties are common
			live[j] = rng.IntN(5) > 0
		}
		var err error
		dst, err = alert.Deviations(dst, vals, live)
		if err != nil {
			t.Fatal(err)
		}
		for i := range vals {
			got := dst[i]
			if !live[i] {
				if got != (alert.Deviation{}) {
					t.Fatalf("trial %d: Deviations(%v, %v)[%d] = %+v, want zero for a member without value", trial, vals, live, i, got)
				}
				continue
			}
			want, peers := refDeviation(vals, live, i)
			if got.Value != want || got.Peers != peers || got.Own != (peers == 0) || !got.Live {
				t.Fatalf("trial %d: Deviations(%v, %v)[%d] = %+v, want value %v peers %d", trial, vals, live, i, got, want, peers)
			}
		}
	}
}

func TestDeviations_Cases(t *testing.T) {
	tests := []struct {
		name string
		vals []float64
		live []bool
		want []alert.Deviation
	}{
		{"two members: the difference", []float64{10, 7}, []bool{true, true},
			[]alert.Deviation{{Live: true, Value: 3, Peers: 1}, {Live: true, Value: -3, Peers: 1}}},
		{"one live member: own signal", []float64{10, 7}, []bool{true, false},
			[]alert.Deviation{{Live: true, Value: 10, Own: true}, {}}},
		{"three members: median of the other two", []float64{1, 2, 9}, []bool{true, true, true},
			[]alert.Deviation{{Live: true, Value: 1 - 5.5, Peers: 2}, {Live: true, Value: 2 - 5, Peers: 2}, {Live: true, Value: 9 - 1.5, Peers: 2}}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got, err := alert.Deviations(nil, tc.vals, tc.live)
			if err != nil {
				t.Fatal(err)
			}
			for i := range tc.want {
				if got[i] != tc.want[i] {
					t.Errorf("Deviations(%v)[%d] = %+v, want %+v", tc.vals, i, got[i], tc.want[i])
				}
			}
		})
	}
	if _, err := alert.Deviations(nil, []float64{1, math.NaN()}, []bool{true, true}); !errors.Is(err, alert.ErrNonFinite) {
		t.Errorf("Deviations(NaN) error = %v, want ErrNonFinite", err)
	}
	if _, err := alert.Deviations(nil, []float64{1, math.NaN()}, []bool{true, false}); err != nil {
		t.Errorf("Deviations(NaN of a member without value) error = %v, want nil", err)
	}
}

// TestPeerGroup_ProcessChangeVersusDrift: five transmitters on one
// header, hourly, N(0, 1) noise each. The process steps by +5 kPa on day
// 20 and ramps at 0.2 kPa/d from day 35 (four times the slope warning
// level); every member sees it. Fitted on their deviations from their
// peers, no member alerts; fitted on their own readings, the ramp alerts
// (so the setup can fail). Then member 2 also drifts at 0.1 kPa/d, the
// slope's critical level, from day 20: it alerts on its deviation (the
// warning level fires; the lower 95% bound rarely exceeds a level the
// drift only equals), and no other member does.
func TestPeerGroup_ProcessChangeVersusDrift(t *testing.T) {
	const seed, members, days = 11, 5, 60
	t.Logf("seed %d", seed)
	r := simRule()
	r.AsLeft, r.Limits = 0, alert.Limits{Slope: alert.RateLimit{Warning: 0.05, Critical: 0.1}}
	process := func(d float64) float64 {
		v := 0.0
		if d >= 20 {
			v += 5
		}
		return v + 0.2*max(0, d-35)
	}
	run := func(drifter int, peer bool) (alerts [members]int) {
		rng := rand.New(rand.NewPCG(seed, uint64(drifter+1)))
		sensors := make([]*rolling.Sensor, members)
		trackers := make([]*alert.Tracker, members)
		for i := range sensors {
			var err error
			if sensors[i], err = rolling.NewSensor(r.Windows...); err != nil {
				t.Fatal(err)
			}
			rr := r
			if !peer {
				rr.AsLeft = 100
			}
			trackers[i] = mustTracker(t, "hdr.pt", rr)
		}
		vals, live := make([]float64, members), make([]bool, members)
		var devs []alert.Deviation
		for at := t0; at.Before(t0.Add(days * day)); at = at.Add(time.Hour) {
			d := at.Sub(t0).Hours() / 24
			for i := range vals {
				vals[i] = 100 + process(d) + rng.NormFloat64()
				if i == drifter {
					vals[i] += 0.1 * max(0, d-20)
				}
				live[i] = true
			}
			var err error
			if devs, err = alert.Deviations(devs, vals, live); err != nil {
				t.Fatal(err)
			}
			ns := at.UnixNano()
			for i, s := range sensors {
				if mask := s.Closes(ns); mask != 0 {
					for w := range r.Windows {
						if mask&(1<<uint(w)) == 0 {
							continue
						}
						sol := s.Solve(w)
						dec, err := trackers[i].Evaluate(at, &sol)
						if err != nil {
							t.Fatal(err)
						}
						for _, e := range dec.Events {
							if e.Type == alert.Raised {
								alerts[i]++
							}
						}
					}
				}
				v := vals[i]
				if peer {
					v = devs[i].Value
				}
				if err := s.Add(rolling.Reading{UnixNano: ns, Value: v}); err != nil {
					t.Fatal(err)
				}
			}
		}
		return alerts
	}

	if got := run(-1, true); got != [members]int{} {
		t.Errorf("process step and ramp, peer deviations: alerts per member %v, want none", got)
	}
	if got := run(-1, false); got == [members]int{} {
		t.Errorf("process ramp on own readings: no alert; the setup cannot tell the two apart")
	} else {
		t.Logf("process ramp on own readings: alerts per member %v", got)
	}
	got := run(2, true)
	t.Logf("member 2 drifting at 0.1 kPa/d, peer deviations: alerts per member %v", got)
	for i, n := range got {
		if (i == 2) != (n > 0) {
			t.Errorf("member %d: %d alerts; want alerts on member 2 only", i, n)
		}
	}
}
