package alert_test

import (
	"math"
	"math/rand/v2"
	"reflect"
	"testing"
	"time"

	"gonum.org/v1/gonum/stat/distuv"

	"driftfit/alert"
	"driftfit/rolling"
)

// fiellerRoots are the roots lo ≤ hi of Fieller's quadratic for the time
// a line c0 + c1·τ reaches L from below, with Var c0 = v00, Cov = 0 and
// Var c1 = v11 at df degrees of freedom,
// (c1² − t²v11)τ² + 2(c0 − L)c1·τ + (c0 − L)² − t²v00 = 0
// (Fieller 1954, J. R. Stat. Soc. B 16(2), 175–185), t the quantile at
// level of Student's t, written out here apart from the package's code.
func fiellerRoots(c0, c1, v00, v11, L float64, df int, level float64) (lo, hi float64) {
	tq := distuv.StudentsT{Mu: 0, Sigma: 1, Nu: float64(df)}.Quantile(level)
	b0 := c0 - L
	a, b, c := c1*c1-tq*tq*v11, b0*c1, b0*b0-tq*tq*v00
	return (-b - math.Sqrt(b*b-a*c)) / a, (-b + math.Sqrt(b*b-a*c)) / a
}

// fiellerLower is the one-sided 95% lower bound: the smaller root at 0.95.
func fiellerLower(c0, c1, v00, v11, L float64, df int) float64 {
	lo, _ := fiellerRoots(c0, c1, v00, v11, L, df, 0.95)
	return lo
}

// TestTracker_LeadTimeEvent_Interval: the scenario's lead-time alert on
// the month window shows the 95% interval of the exit time from the
// confidence band of the mean the gate judges; for a line it is
// Fieller's two-sided interval, (5.855, 7.731) days for c0 = 100,
// c1 = 0.15, SE 0.01 each, 28 df, the edge at 101, and the ticket's
// ExitCI (rolling's closed form) agrees.
func TestTracker_LeadTimeEvent_Interval(t *testing.T) {
	_, events, tk := scenario(t)
	lo, hi := fiellerRoots(100, warnC1, 1e-4, se*se, 101, 28, 0.975)
	var found bool
	for _, e := range events {
		if e.Kind != alert.LeadTime || e.Window != "30d/1d" || e.Type != alert.Raised {
			continue
		}
		found = true
		if math.Abs(e.CI[0]-lo) > 1e-3 || math.Abs(e.CI[1]-hi) > 1e-3 {
			t.Errorf("lead-time CI %v, want Fieller's (%.4f, %.4f) days", e.CI, lo, hi)
		}
	}
	if !found {
		t.Fatal("no lead-time alert raised on the month window")
	}
	at := func(d float64) time.Time { return t0.Add(time.Duration(d * float64(day))) }
	if d0, d1 := tk.ExitCI[0].Sub(at(lo)), tk.ExitCI[1].Sub(at(hi)); d0.Abs() > time.Second || d1.Abs() > time.Second {
		t.Errorf("ticket ExitCI %v, want Fieller's %v, %v", tk.ExitCI, at(lo), at(hi))
	}
}

// TestTracker_Ticket_DueFromLowerBound: the scenario's ticket (month
// window, line at the as-left 100 kPa rising 0.15 kPa/d, SE 0.01 on both
// coefficients, 28 df, band ±1 kPa) with a margin of 1 day. By hand:
// t = 1.7011 (R qt(0.95, 28), from memory), a = 0.0225 − 2.894e-4,
// b = −0.15, c = 1 − 2.894e-4, lower root 5.979 days; the point exit is
// 1/0.15 = 6.667 days. Due = 5.979 − 1 = 4.979 days after the newest
// reading.
func TestTracker_Ticket_DueFromLowerBound(t *testing.T) {
	r := scenarioRule()
	r.TicketMargin = day
	tr := mustTracker(t, "qm.u2.dp-7", r)
	sol := lineSol(month, t0, warnC1, se)
	d, err := tr.Evaluate(t0, &sol)
	if err != nil {
		t.Fatal(err)
	}
	if d.Opened == nil {
		t.Fatal("no ticket opened")
	}
	tk := *d.Opened
	lower := fiellerLower(100, warnC1, 0.01*0.01, se*se, 101, 28)
	if math.Abs(lower-5.979) > 0.001 {
		t.Fatalf("hand-worked lower bound %v, want 5.979", lower)
	}
	at := func(days float64) time.Time { return t0.Add(time.Duration(days * float64(day))) }
	if got := tk.ExitLowerBound.Sub(at(lower)); got < -time.Second || got > time.Second {
		t.Errorf("ExitLowerBound %v, want %v (%.4f days)", tk.ExitLowerBound, at(lower), lower)
	}
	if got := tk.Due.Sub(at(lower - 1)); got < -time.Second || got > time.Second || tk.DueBasis != alert.DueExitLowerBound {
		t.Errorf("Due %v (%s), want %v: the lower bound less the 1-day margin", tk.Due, tk.DueBasis, at(lower-1))
	}
	if !tk.Exit.After(tk.ExitLowerBound) || !tk.ExitCI[0].Before(tk.Exit) || !tk.ExitCI[1].After(tk.Exit) {
		t.Errorf("exit %v, lower bound %v, Fieller interval %v: want bound < exit inside the interval", tk.Exit, tk.ExitLowerBound, tk.ExitCI)
	}
	if tk.Revision != 0 || !tk.AsOf.Equal(t0) || tk.Overdue || tk.AsFound.Interval != alert.PredictionInterval {
		t.Errorf("ticket revision %d as of %v overdue %v interval %q, want 0, %v, false, %q",
			tk.Revision, tk.AsOf, tk.Overdue, tk.AsFound.Interval, t0, alert.PredictionInterval)
	}
}

// TestTracker_Ticket_Revisions re-estimates the ticket of
// TestTracker_Ticket_DueFromLowerBound (due 4.979 days after t0, fitted
// exit 6.667) at later evaluations of its window. The rule (see Ticket):
// revise when Due moves sooner by more than max(1 day, a quarter of the
// time it had left), later by more than max(7 days, a quarter) with the
// new lower bound past the old fitted exit, or it falls overdue; an
// estimate without a bound keeps the bounded date; an overdue ticket is
// not revised again while it stays overdue. Bounds by fiellerLower.
func TestTracker_Ticket_Revisions(t *testing.T) {
	r := scenarioRule()
	r.TicketMargin = day
	// Line at level c0 rising c1 per day, newest reading at `last`.
	sol := func(last time.Time, c0, c1 float64) rolling.Solution {
		s := lineSol(month, last, c1, se)
		s.Line.Coef[0] = c0
		s.Line.CI[0] = [2]float64{c0 - s.Line.TCrit*0.01, c0 + s.Line.TCrit*0.01}
		return s
	}
	type step struct {
		name    string
		at      float64 // days after t0
		c0, c1  float64
		revised bool
		basis   string
		overdue bool
	}
	steps := []step{
		// Bound 5.979 d from day 1: due 5.979 d after t0, 1 day later:
		// under 7 days.
		{"same trend a day later", 1, 100.15, warnC1, false, "", false},
		// Bound about 1.5 d from day 1.5: due near day 2, about 3 days
		// sooner, more than max(1 d, 3.48/4 d).
		{"faster drift: due sooner", 1.5, 100.5, 0.3, true, alert.DueExitLowerBound, false},
		{"no significant rate: the bounded date stays", 1.75, 100.5, 0.001, false, "", false},
		// Bound about 2.2 d from day 1.8: due about a day later: under 7 days.
		{"a little slower: within the evidence", 1.8, 100.5, 0.2, false, "", false},
		{"due date passed", 3, 100.5, 0.001, true, alert.DueExitLowerBound, true},
		{"overdue already flagged", 4, 100.5, 0.3, false, "", true},
	}
	tr := mustTracker(t, "qm.u2.dp-7", r)
	first := sol(t0, 100, warnC1)
	if d, err := tr.Evaluate(t0, &first); err != nil || d.Opened == nil {
		t.Fatalf("opening: %v, %+v", err, d)
	}
	rev := 0
	for _, s := range steps {
		now := t0.Add(time.Duration(s.at * float64(day)))
		in := sol(now, s.c0, s.c1)
		before, _ := tr.Ticket()
		d, err := tr.Evaluate(now, &in)
		if err != nil {
			t.Fatal(err)
		}
		after, _ := tr.Ticket()
		if (d.Revised != nil) != s.revised {
			t.Errorf("%s: revised %v, want %v (due %v → %v)", s.name, d.Revised != nil, s.revised, before.Due, after.Due)
			continue
		}
		if after.Overdue != s.overdue {
			t.Errorf("%s: overdue %v, want %v (due %v, now %v)", s.name, after.Overdue, s.overdue, after.Due, now)
		}
		if !s.revised {
			if after.Due != before.Due || after.Revision != before.Revision {
				t.Errorf("%s: ticket changed without a revision: due %v → %v", s.name, before.Due, after.Due)
			}
			continue
		}
		rev++
		tk := d.Revised
		if tk.Revision != rev || !tk.AsOf.Equal(now) || tk.DueBasis != s.basis || tk.ID != before.ID || !tk.Opened.Equal(t0) {
			t.Errorf("%s: revision %d as of %v basis %s id %s, want %d, %v, %s, %s", s.name, tk.Revision, tk.AsOf, tk.DueBasis, tk.ID, rev, now, s.basis, before.ID)
		}
		if !reflect.DeepEqual(*tk, after) {
			t.Errorf("%s: Decision.Revised differs from the tracker's ticket", s.name)
		}
	}
}

// TestTracker_Evaluate_LongerSerialEstimate: AR(1) noise of φ 0.9 read
// every 10 minutes for 31 days. The 1-day window's own lag-1 estimate
// (143 pairs) is biased low; the tracker judges it with the 30-day
// window's (4,319 pairs) when that is larger, so its effective count is
// N(1 − r)/(1 + r) with the 30-day r, about 144·0.1/1.9 = 7.6, below
// MinReadings 30: not judged (FewEffective). The estimate survives a
// state round trip.
func TestTracker_Evaluate_LongerSerialEstimate(t *testing.T) {
	const seed = 20261204
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 1))
	r := ptRule()
	tr := mustTracker(t, "qm.u1.steam.pt-101", r)
	s, err := rolling.NewSensor(r.Windows...)
	if err != nil {
		t.Fatal(err)
	}
	g := newNoiseGen(noiseSpec{step: 10 * time.Minute, phi: 0.9}, rng)
	end := t0.Add(31 * day)
	for at := t0; !at.After(end); at = at.Add(10 * time.Minute) {
		if at.Equal(end) {
			break
		}
		if err := s.Add(rolling.Reading{UnixNano: at.UnixNano(), Value: ptLevel + g.next(rng, 0, at.Equal(t0))}); err != nil {
			t.Fatal(err)
		}
	}
	long := s.SolveJudged(1)
	short := s.SolveJudged(0)
	if long.Parabola.SerialErr != nil || short.Parabola.SerialErr != nil || short.Parabola.R1 >= long.Parabola.R1 {
		t.Fatalf("r1 of the 1-day window %v (%v), of the 30-day window %v (%v): want both known, the 1-day smaller",
			short.Parabola.R1, short.Parabola.SerialErr, long.Parabola.R1, long.Parabola.SerialErr)
	}
	if _, err := tr.Evaluate(end, &long); err != nil {
		t.Fatal(err)
	}
	d, err := tr.Evaluate(end, &short)
	if err != nil {
		t.Fatal(err)
	}
	rr := max(long.Parabola.R1, 0)
	want := float64(short.Line.N) * (1 - rr) / (1 + rr)
	if d.Judgement.Reason != alert.FewEffective || math.Abs(d.Judgement.NEff-want) > 1e-9*want {
		t.Errorf("1-day window judgement %v, n_eff %.3f; want %v with n_eff %.3f from the 30-day r1 %.4f (own %.4f)",
			d.Judgement.Reason, d.Judgement.NEff, alert.FewEffective, want, long.Parabola.R1, short.Parabola.R1)
	}
	b, err := tr.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	back := mustTracker(t, "qm.u1.steam.pt-101", r)
	if err := back.UnmarshalBinary(b); err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(tr, back) {
		t.Error("state round trip lost the serial estimate")
	}
	d2, err := back.Evaluate(end.Add(time.Hour), &short)
	if err != nil {
		t.Fatal(err)
	}
	if d2.Judgement.NEff != d.Judgement.NEff {
		t.Errorf("after a round trip n_eff %v, want %v", d2.Judgement.NEff, d.Judgement.NEff)
	}
}
