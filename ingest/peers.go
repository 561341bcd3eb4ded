package ingest

import (
	"driftfit/alert"
	"driftfit/rolling"
)

// A peer group turns the readings of its members into each member's
// deviation from the group, on common time buckets, and fits that
// deviation in a sensor of its own whose pane closes feed the member's
// peer alert rule. A change of the process moves the whole group and
// cancels; a drifting member stands out.
//
// While a group has fewer than two live members in a bucket there is no
// one to compare with: its members are judged on their own signal (the
// raw fits) until two are live again, and the change is logged.
//
// Every member of a group is routed to one worker, which owns the group
// outright: no locks.
type peerGroup struct {
	name      string
	width     int64 // bucket width, ns: the members' shortest pane
	members   []*peerMember
	buckets   map[int64][]peerSum // bucket index → per member sums
	newest    int64               // newest reading time seen, Unix ns
	finalized int64               // buckets up to this index are done
	started   bool
	comparing bool // the last finalized bucket had two or more live members
	devs      []alert.Deviation
	vals      []float64
	live      []bool
}

type peerMember struct {
	g      *peerGroup
	i      int // index in g.members
	ref    *sensorRef
	sensor *rolling.Sensor // the deviation signal
}

type peerSum struct {
	sum float64
	n   int
}

// join makes ref a member of the worker's group name, creating the group
// with ref's windows on first use. A member whose windows cannot make a
// deviation sensor is left out, and says so.
func (w *worker) join(ref *sensorRef, name string, windows []rolling.WindowSpec) {
	if len(windows) == 0 {
		return
	}
	s, err := rolling.NewSensor(windows...)
	if err != nil {
		w.s.log.Warn().Str("sensor", ref.id).Str("group", name).Err(err).Msg("peer group member left out")
		return
	}
	g := w.groups[name]
	if g == nil {
		width := windows[0].Pane
		for _, win := range windows {
			width = min(width, win.Pane)
		}
		g = &peerGroup{name: name, width: int64(width), buckets: map[int64][]peerSum{}}
		w.groups[name] = g
	}
	m := &peerMember{g: g, i: len(g.members), ref: ref, sensor: s}
	g.members = append(g.members, m)
	for k, sums := range g.buckets {
		g.buckets[k] = append(sums, peerSum{})
	}
	ref.st.member = m
}

// peerApplied takes a member's newly applied readings.
func (w *worker) peerApplied(m *peerMember, readings []rolling.Reading) {
	g := m.g
	for _, r := range readings {
		k := floorDiv(r.UnixNano, g.width)
		if g.started && k <= g.finalized {
			continue // its bucket is already compared
		}
		sums := g.buckets[k]
		if sums == nil {
			sums = make([]peerSum, len(g.members))
			g.buckets[k] = sums
		}
		sums[m.i].sum += r.Value
		sums[m.i].n++
		if !g.started {
			g.finalized, g.started = k-1, true
		}
		g.newest = max(g.newest, r.UnixNano)
	}
	// A bucket is compared once readings a whole bucket later arrived,
	// so members reporting a little late still count.
	for last := floorDiv(g.newest, g.width) - 2; g.finalized < last; {
		g.finalized++
		w.compare(g, g.finalized)
	}
}

// compare computes the deviations of bucket k and feeds them to the
// members' deviation sensors, judging each window whose pane closes.
func (w *worker) compare(g *peerGroup, k int64) {
	sums, ok := g.buckets[k]
	if !ok {
		return
	}
	delete(g.buckets, k)
	g.vals, g.live = g.vals[:0], g.live[:0]
	nlive := 0
	for _, s := range sums {
		v, live := 0.0, s.n > 0
		if live {
			v = s.sum / float64(s.n)
			nlive++
		}
		g.vals, g.live = append(g.vals, v), append(g.live, live)
	}
	var err error
	if g.devs, err = alert.Deviations(g.devs, g.vals, g.live); err != nil {
		w.s.badLog.Warn().Str("group", g.name).Err(err).Msg("peer comparison skipped")
		return
	}
	if now := nlive >= 2; now != g.comparing {
		g.comparing = now
		ev := w.s.log.Info().Str("group", g.name).Int("live", nlive)
		if now {
			ev.Msg("peer group comparing its members")
		} else {
			ev.Msg("peer group has fewer than two live members: members judged on their own signal")
		}
	}
	if !g.comparing {
		return
	}
	at := k*g.width + g.width/2
	for i, d := range g.devs {
		if !d.Live || d.Own {
			continue
		}
		m := g.members[i]
		if mask := m.sensor.Closes(at); mask != 0 {
			for win := range m.sensor.Windows() {
				if mask&(1<<uint(win)) != 0 {
					sol := m.sensor.SolveJudged(win)
					if sol.Parabola.SerialErr != nil && m.ref.st.sensor != nil {
						// A deviation fit of one value a bucket has too few
						// pairs of its own: take the estimate of the
						// member's own readings, whose correlation includes
						// the process swings the deviation cancels, so the
						// correction errs on the wide side.
						if own := m.ref.st.sensor.SolveJudged(m.ref.st.sensor.Windows() - 1); own.Parabola.SerialErr == nil {
							sol = sol.WithSerial(own.Parabola.R1, own.Parabola.Pairs)
						}
					}
					w.judge(m.ref, true, &sol)
				}
			}
		}
		_ = m.sensor.Add(rolling.Reading{UnixNano: at, Value: d.Value})
	}
}

// comparing reports whether the sensor is judged on its deviation from
// its peer group now rather than on its own fits.
func (st *sensorState) comparing() bool { return st.member != nil && st.member.g.comparing }

func floorDiv(a, b int64) int64 {
	q := a / b
	if a%b != 0 && a < 0 {
		q--
	}
	return q
}
