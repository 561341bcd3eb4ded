package alert_test

import (
	"errors"
	"math"
	"math/rand/v2"
	"slices"
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

// TestPeerDeviations_Cases: the reference is the median of every usable
// live member, the member itself included, written out per case.
func TestPeerDeviations_Cases(t *testing.T) {
	tests := []struct {
		name string
		vals []float64
		live []bool
		use  []bool
		want []alert.Deviation
	}{
		// Median of {0, 0.2, 9} is 0.2: the drifter at 9 moves nobody.
		{"three, one far off", []float64{0, 0.2, 9}, []bool{true, true, true}, nil,
			[]alert.Deviation{{Live: true, Value: -0.2, Peers: 2}, {Live: true, Value: 0, Peers: 2}, {Live: true, Value: 8.8, Peers: 2}}},
		// Median of {1, 2, 3, 10} is 2.5.
		{"four", []float64{1, 2, 3, 10}, []bool{true, true, true, true}, nil,
			[]alert.Deviation{{Live: true, Value: -1.5, Peers: 3}, {Live: true, Value: -0.5, Peers: 3}, {Live: true, Value: 0.5, Peers: 3}, {Live: true, Value: 7.5, Peers: 3}}},
		// Two: the mean 8.5, deviations ±1.5, marked as a pair.
		{"pair", []float64{10, 7}, []bool{true, true}, nil,
			[]alert.Deviation{{Live: true, Value: 1.5, Peers: 1, Pair: true}, {Live: true, Value: -1.5, Peers: 1, Pair: true}}},
		// Member 2 left out (stuck): reference the pair {0, 0.2}, mean 0.1.
		{"one left out", []float64{0, 0.2, 9}, []bool{true, true, true}, []bool{true, true, false},
			[]alert.Deviation{{Live: true, Value: -0.1, Peers: 1, Pair: true}, {Live: true, Value: 0.1, Peers: 1, Pair: true}, {Live: true, Value: 8.9, Peers: 2}}},
		{"one live", []float64{10, 7}, []bool{true, false}, nil,
			[]alert.Deviation{{Live: true, Value: 10, Own: true}, {}}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got, err := alert.PeerDeviations(nil, tc.vals, tc.live, tc.use)
			if err != nil {
				t.Fatal(err)
			}
			for i := range tc.want {
				if math.Abs(got[i].Value-tc.want[i].Value) > 1e-12 {
					t.Errorf("PeerDeviations(%v)[%d].Value = %v, want %v", tc.vals, i, got[i].Value, tc.want[i].Value)
				}
				got[i].Value = tc.want[i].Value
				if got[i] != tc.want[i] {
					t.Errorf("PeerDeviations(%v)[%d] = %+v, want %+v", tc.vals, i, got[i], tc.want[i])
				}
			}
		})
	}
	if _, err := alert.PeerDeviations(nil, []float64{1, math.Inf(1)}, []bool{true, true}, nil); !errors.Is(err, alert.ErrNonFinite) {
		t.Errorf("PeerDeviations(Inf) error = %v, want ErrNonFinite", err)
	}
}

func TestAttribute_Cases(t *testing.T) {
	j := func(breach, own bool) alert.PeerEvidence {
		return alert.PeerEvidence{Judged: true, Breach: breach, Own: own, InReference: true}
	}
	A, G, P, M, N := alert.PeerAttributed, alert.PeerAgrees, alert.PeerPairDisagreement, alert.PeerAmbiguous, alert.PeerNotJudged
	tests := []struct {
		name string
		ev   []alert.PeerEvidence
		want []alert.PeerOutcome
	}{
		{"three, one breaches", []alert.PeerEvidence{j(true, false), j(false, false), j(false, false)}, []alert.PeerOutcome{A, G, G}},
		{"three, two breach", []alert.PeerEvidence{j(true, false), j(true, false), j(false, false)}, []alert.PeerOutcome{M, M, G}},
		{"pair, both breach", []alert.PeerEvidence{j(true, false), j(true, false)}, []alert.PeerOutcome{P, P}},
		{"pair, one breaches", []alert.PeerEvidence{j(true, false), j(false, false)}, []alert.PeerOutcome{P, G}},
		{"pair, own evidence decides", []alert.PeerEvidence{j(true, true), j(true, false)}, []alert.PeerOutcome{A, P}},
		{"pair, both with own evidence", []alert.PeerEvidence{j(true, true), j(true, true)}, []alert.PeerOutcome{P, P}},
		{"pair, one silent", []alert.PeerEvidence{j(true, false), {}}, []alert.PeerOutcome{N, N}},
		{"left out member stands out", []alert.PeerEvidence{j(false, false), j(false, false), {Judged: true, Breach: true}},
			[]alert.PeerOutcome{G, G, A}},
		{"left out, reference breaches too", []alert.PeerEvidence{j(true, false), j(false, false), {Judged: true, Breach: true}},
			[]alert.PeerOutcome{P, G, M}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got := alert.Attribute(nil, tc.ev)
			if !slices.Equal(got, tc.want) {
				t.Errorf("Attribute(%+v) = %v, want %v", tc.ev, got, tc.want)
			}
		})
	}
}

// TestPeers_Attribution: groups of 2, 3 and 4 transmitters on one
// header, hourly, N(0, 1) noise each, 60 days. The whole group sees a
// process step of +5 kPa on day 20 and a ramp of 0.2 kPa/d from day 35
// (four times the slope warning level). Limits: slope warning 0.05,
// critical 0.1 kPa/d. Members are fitted on PeerDeviations and judged
// by Attribute at every pane close of the 30-day window:
//   - no drifter: nobody attributed;
//   - member 0 drifting from day 20 at 1× and 2× the critical level:
//     with 3 and 4 members it is attributed and nobody else is; with 2
//     the pair disagrees (the deviations are ±half the drift) and
//     nobody is attributed, until the drifter is given evidence of its
//     own, when it alone is;
//   - with 3 and 4 members, the last one falls silent on day 30 (no
//     drifter): nobody is attributed.
//
// A drift at exactly the critical level rarely puts the 95% lower bound
// beyond it, so at 1× the warning level is what fires.
func TestPeers_Attribution(t *testing.T) {
	const seed, days = 23, 60
	t.Logf("seed %d", seed)
	r := simRule()
	r.AsLeft, r.Limits = 0, alert.Limits{Slope: alert.RateLimit{Warning: 0.05, Critical: 0.1}}
	r.TicketKinds = []alert.Kind{}
	process := func(d float64) float64 {
		v := 0.0
		if d >= 20 {
			v += 5
		}
		return v + 0.2*max(0, d-35)
	}
	type result struct {
		attributed []int // pane closes each member was attributed on
		pair       int   // pane closes with a pair disagreement
		tickets    []int
		healthy    int // pane closes where a member other than 0 breached
	}
	legacy := false // fit on Deviations (median of the others) instead
	run := func(members int, drift float64, silent, own bool) result {
		rng := rand.New(rand.NewPCG(seed, uint64(members*100)+uint64(drift*100)))
		res := result{attributed: make([]int, members), tickets: make([]int, members)}
		sensors := make([]*rolling.Sensor, members)
		trackers := make([]*alert.Tracker, members)
		for i := range sensors {
			var err error
			if sensors[i], err = rolling.NewSensor(r.Windows...); err != nil {
				t.Fatal(err)
			}
			trackers[i] = mustTracker(t, "hdr.pt", r)
		}
		vals, live := make([]float64, members), make([]bool, members)
		var devs []alert.Deviation
		ev := make([]alert.PeerEvidence, members)
		var out []alert.PeerOutcome
		sols := make([]rolling.Solution, members)
		for at := t0; at.Before(t0.Add(days * day)); at = at.Add(time.Hour) {
			d := at.Sub(t0).Hours() / 24
			inRef := 0
			for i := range vals {
				vals[i] = 100 + process(d) + rng.NormFloat64()
				if i == 0 {
					vals[i] += drift * max(0, d-20)
				}
				live[i] = !(silent && i == members-1 && d >= 30)
				if live[i] {
					inRef++
				}
			}
			var err error
			if legacy {
				devs, err = alert.Deviations(devs, vals, live)
			} else {
				devs, err = alert.PeerDeviations(devs, vals, live, nil)
			}
			if err != nil {
				t.Fatal(err)
			}
			ns := at.UnixNano()
			closed := false
			for i, s := range sensors {
				mask := s.Closes(ns)
				if mask&2 == 0 { // the 30-day window
					continue
				}
				closed = true
				sols[i] = s.Solve(1)
				dec, err := trackers[i].EvaluatePeers(at, &sols[i], inRef, 2)
				if err != nil {
					t.Fatal(err)
				}
				breach := false
				for _, a := range trackers[i].Alerts() {
					if a.Window == sols[i].Window && a.Kind == alert.Slope && (a.State == alert.Pending || a.State == alert.Firing) {
						breach = true
					}
				}
				ev[i] = alert.PeerEvidence{Judged: dec.Judgement.OK(), Breach: breach, InReference: live[i], Own: own && i == 0 && breach}
				if breach && i > 0 {
					res.healthy++
				}
			}
			if closed {
				out = alert.Attribute(out, ev)
				for i, o := range out {
					switch o {
					case alert.PeerAttributed:
						res.attributed[i]++
						if dec, err := trackers[i].OpenTicket(at, &sols[i], alert.Slope); err != nil {
							t.Fatal(err)
						} else if dec.Opened != nil {
							res.tickets[i]++
						}
					case alert.PeerPairDisagreement:
						res.pair++
					}
				}
			}
			for i, s := range sensors {
				if !devs[i].Live {
					continue
				}
				if err := s.Add(rolling.Reading{UnixNano: ns, Value: devs[i].Value}); err != nil {
					t.Fatal(err)
				}
			}
		}
		return res
	}
	none := func(v []int) bool { return !slices.ContainsFunc(v, func(n int) bool { return n > 0 }) }
	for _, members := range []int{2, 3, 4} {
		if got := run(members, 0, false, false); !none(got.attributed) || got.pair > 0 {
			t.Errorf("%d members, process step and ramp only: attributed %v, pair disagreements %d; want none", members, got.attributed, got.pair)
		}
		for _, mult := range []float64{1, 2} {
			drift := mult * r.Limits.Slope.Critical
			got := run(members, drift, false, false)
			t.Logf("%d members, member 0 drifting at %.2f kPa/d: pane closes attributed per member %v, pair disagreements %d, tickets %v",
				members, drift, got.attributed, got.pair, got.tickets)
			if members == 2 {
				if !none(got.attributed) {
					t.Errorf("pair, drift %v: attributed %v; want nobody without evidence of its own", drift, got.attributed)
				}
				if mult == 2 && got.pair == 0 {
					t.Errorf("pair, drift %v: no pair disagreement", drift)
				}
				own := run(members, drift, false, true)
				if mult == 2 && (own.attributed[0] == 0 || own.attributed[1] > 0 || own.tickets[0] != 1) {
					t.Errorf("pair, drift %v, member 0 with evidence of its own: attributed %v, tickets %v; want member 0 only, one ticket",
						drift, own.attributed, own.tickets)
				}
				continue
			}
			if got.attributed[0] == 0 || got.tickets[0] != 1 {
				t.Errorf("%d members, drift %v: member 0 attributed %d times, %d tickets; want attributed, one ticket", members, drift, got.attributed[0], got.tickets[0])
			}
			if got.healthy > 0 {
				t.Errorf("%d members, drift %v: healthy members breached on %d pane closes; want none", members, drift, got.healthy)
			}
			if !none(got.attributed[1:]) || !none(got.tickets[1:]) {
				t.Errorf("%d members, drift %v: others attributed %v, tickets %v; want none", members, drift, got.attributed[1:], got.tickets[1:])
			}
		}
		if members >= 3 {
			if got := run(members, 0, true, false); !none(got.attributed) {
				t.Errorf("%d members, the last silent from day 30: attributed %v; want nobody", members, got.attributed)
			}
		}
	}
	// The setup can fail: with the median of the two others, half of a
	// drift of 2× the critical level leaks into the healthy members of
	// three, whose deviations then drift at the critical level and breach.
	legacy = true
	got := run(3, 2*r.Limits.Slope.Critical, false, false)
	t.Logf("3 members fitted on Deviations, drift %.2f kPa/d: healthy members breached on %d pane closes, attributed %v",
		2*r.Limits.Slope.Critical, got.healthy, got.attributed)
	if got.healthy == 0 {
		t.Errorf("Deviations with 3 members: no healthy member breached; the test cannot tell the references apart")
	}
}
