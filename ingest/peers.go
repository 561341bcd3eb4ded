package ingest

import (
	"math"
	"slices"
	"strings"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
	"driftfit/store"
)

// A peer group turns the readings of its members into each member's
// deviation from the group's robust reference (alert.PeerDeviations: the
// median of the usable members, the member itself included), on common
// time buckets, and fits that deviation in a sensor of its own whose
// pane closes feed the member's peer alert rule. A change of the process
// moves the whole group and cancels; a drifting member stands out, and
// with three or more members it cannot move the reference of the others.
// Members whose own detectors find them stuck, silent or spiking are
// left out of the reference (they still get a deviation).
//
// A raise of a member's deviation opens no ticket by itself (the peer
// rule's TicketKinds is empty): after every pane close the group asks
// alert.Attribute which members the breach belongs to, and only an
// attributed member gets its ticket (Tracker.OpenTicket). Two members
// that disagree are a pair disagreement: neither is ticketed unless one
// alone has evidence of its own (a step or data-quality alert).
//
// A bucket is compared once every member that still reports has a
// watermark two buckets past it. The watermark of a member is its newest
// reading time, unless that one reading lies more than the lateness
// ahead of the member's next newest: one reading stamped ahead of the
// rest (a live reading during a historian backfill) then moves nothing
// until the member's other readings catch up. A member whose watermark
// falls more than the lateness behind the group's newest, while the
// others sent two rounds of messages since its last one, is quiet: the
// group stops waiting for it, and it is live in no bucket compared
// meanwhile (its late readings for those buckets are not compared).
//
// While fewer than two members are usable in a bucket there is no one to
// compare with: the members are judged on their own signal (the raw
// fits) until two are again, and the change is logged.
//
// Every member of a group is routed to one worker, which owns the group
// outright: no locks. The members' deviation sensors are stored with the
// member under the id <member id>~peers (panes only, no fit history) and
// restored with the service; what is restored holds every bucket
// compared before the last commit, while the sums of buckets not yet
// compared start afresh.
type peerGroup struct {
	name      string
	width     int64 // bucket width, ns: the members' shortest pane
	lateness  int64 // ns; see the type comment
	members   []*peerMember
	buckets   map[int64][]peerSum // bucket index → per member sums
	finalized int64               // buckets up to this index are done
	msgs      uint64              // messages of members taken
	started   bool
	comparing bool // the last compared bucket had two or more usable members

	// scratch of compare
	devs     []alert.Deviation
	vals     []float64
	live     []bool
	use      []bool
	ev       []alert.PeerEvidence
	outcomes []alert.PeerOutcome
}

type peerMember struct {
	g      *peerGroup
	i      int // index in g.members
	ref    *sensorRef
	sensor *rolling.Sensor // the deviation signal
	// dirty asks the next snapshot to store sensor; dropped to delete
	// its stored panes first (after a calibration).
	dirty, dropped bool

	// top1 > top2 are the two newest reading times (Unix ns); n counts
	// the readings seen, up to 2.
	top1, top2 int64
	n          int
	quiet      bool
	lastMsg    uint64 // g.msgs after the member's newest message

	// per compare: the windows whose deviation pane closed, their
	// solutions and whether they were judged
	closed []peerClose
	// outcome is the last attribution per window and kind, to log changes.
	outcome map[peerOutcomeKey]alert.PeerOutcome
}

type peerClose struct {
	sol    rolling.Solution
	judged bool
}

type peerOutcomeKey struct {
	w rolling.WindowSpec
	k alert.Kind
}

type peerSum struct {
	sum float64
	n   int
}

// defaultLatenessBuckets is the lateness of a group, in buckets, when the
// members' rules set no silence time (our choice: a member four buckets
// behind the rest has stopped, not lagged).
const defaultLatenessBuckets = 4

// peerSensorID is the store id of a member's deviation sensor.
func peerSensorID(id string) string { return id + peerKey }

// restoredID returns the id whose configuration a stored sensor takes:
// a member's deviation sensor takes its member's.
func restoredID(id string) string { return strings.TrimSuffix(id, peerKey) }

// keepPeerSensor keeps a restored deviation sensor for its member's
// join and reports whether r was one. Called by restore alone, before
// the workers run; the workers only read savedPeers after.
func (s *Service) keepPeerSensor(r store.Restored) bool {
	if !strings.HasSuffix(r.ID, peerKey) {
		return false
	}
	if s.dq.savedPeers == nil {
		s.dq.savedPeers = map[string]*rolling.Sensor{}
	}
	if r.SetAside != nil {
		s.log.Error().Str("sensor", r.ID).Err(r.SetAside).Msg("stored state set aside: the sensor starts afresh")
		if m := s.o.Metrics; m != nil {
			m.SetAside.Inc()
		}
		return true
	}
	if r.Sensor != nil {
		s.dq.savedPeers[r.ID] = r.Sensor
	}
	return true
}

// join makes ref a member of the worker's group name, creating the group
// with ref's windows on first use. A member whose windows cannot make a
// deviation sensor is left out, and says so.
func (w *worker) join(ref *sensorRef, name string, windows []rolling.WindowSpec) {
	if len(windows) == 0 {
		return
	}
	s := w.s.dq.savedPeers[peerSensorID(ref.id)]
	if s == nil || !sameSpecs(specsOf(s), windows) {
		var err error
		if s, err = rolling.NewSensor(windows...); err != nil {
			w.s.log.Warn().Str("sensor", ref.id).Str("group", name).Err(err).Msg("peer group member left out")
			return
		}
	}
	g := w.groups[name]
	if g == nil {
		width := windows[0].Pane
		for _, win := range windows {
			width = min(width, win.Pane)
		}
		g = &peerGroup{name: name, width: int64(width), lateness: defaultLatenessBuckets * int64(width), buckets: map[int64][]peerSum{}}
		w.groups[name] = g
	}
	if e := w.entry(ref, false); e != nil {
		if silent := e.tr.Rule().Detect.Silent; silent > 0 {
			g.lateness = max(g.lateness, int64(silent))
		}
	}
	m := &peerMember{g: g, i: len(g.members), ref: ref, sensor: s, outcome: map[peerOutcomeKey]alert.PeerOutcome{}}
	g.members = append(g.members, m)
	for k, sums := range g.buckets {
		g.buckets[k] = append(sums, peerSum{})
	}
	ref.st.member = m
}

func sameSpecs(a, b []rolling.WindowSpec) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

// watermark returns how far the member's readings have come (Unix ns),
// and false before it has two readings (one reading alone may be the
// stray one; see peerGroup).
func (m *peerMember) watermark() (int64, bool) {
	switch {
	case m.n < 2:
		return 0, false
	case m.top1-m.top2 > m.g.lateness:
		return m.top2, true
	}
	return m.top1, true
}

// peerApplied takes a member's newly applied readings.
func (w *worker) peerApplied(m *peerMember, readings []rolling.Reading) {
	g := m.g
	for _, r := range readings {
		t := r.UnixNano
		switch {
		case m.n == 0 || t > m.top1:
			m.top1, m.top2 = t, m.top1
			m.n = min(m.n+1, 2)
		case t > m.top2 || m.n == 1:
			m.top2 = t
			m.n = 2
		}
		k := floorDiv(t, g.width)
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
	}
	g.msgs++
	m.lastMsg = g.msgs
	w.advance(g)
}

// advance compares every bucket that each member still reporting has
// passed by two buckets, so that a member reporting a little late still
// counts.
func (w *worker) advance(g *peerGroup) {
	if !g.started {
		return
	}
	newest, any := int64(math.MinInt64), false
	for _, m := range g.members {
		if wm, ok := m.watermark(); ok {
			newest, any = max(newest, wm), true
		}
	}
	if !any {
		return
	}
	last := int64(math.MaxInt64)
	for _, m := range g.members {
		wm, ok := m.watermark()
		if !ok {
			continue
		}
		// Behind by more than the lateness, and passed by two rounds of
		// the others' messages: a member whose readings come a day to a
		// message is not quiet while the others' messages of that day are
		// still arriving.
		quiet := newest-wm > g.lateness && g.msgs-m.lastMsg > 2*uint64(len(g.members)-1)
		if quiet != m.quiet {
			m.quiet = quiet
			ev := w.s.log.Info().Str("sensor", m.ref.id).Str("group", g.name).Time("watermark", time.Unix(0, wm).UTC()).Time("group_newest", time.Unix(0, newest).UTC())
			if quiet {
				ev.Msg("peer group member quiet: the group no longer waits for it")
			} else {
				ev.Msg("peer group member reporting again")
			}
		}
		if !quiet {
			last = min(last, floorDiv(wm, g.width)-2)
		}
	}
	for g.finalized < last {
		g.finalized++
		w.compare(g, g.finalized)
	}
}

// compare computes the deviations of bucket k, feeds them to the
// members' deviation sensors, judges each window whose pane closes, and
// attributes the breaches.
func (w *worker) compare(g *peerGroup, k int64) {
	sums, ok := g.buckets[k]
	if !ok {
		return
	}
	delete(g.buckets, k)
	n := len(g.members)
	g.vals, g.live, g.use = g.vals[:0], g.live[:0], g.use[:0]
	usable := 0
	for i, s := range sums {
		v, live := 0.0, s.n > 0
		if live {
			v = s.sum / float64(s.n)
		}
		use := live && !g.members[i].ref.st.suspect()
		if use {
			usable++
		}
		g.vals, g.live, g.use = append(g.vals, v), append(g.live, live), append(g.use, use)
	}
	var err error
	if g.devs, err = alert.PeerDeviations(g.devs, g.vals, g.live, g.use); err != nil {
		w.s.badLog.Warn().Str("group", g.name).Err(err).Msg("peer comparison skipped")
		return
	}
	if now := usable >= 2; now != g.comparing {
		g.comparing = now
		ev := w.s.log.Info().Str("group", g.name).Int("live", usable)
		if now {
			ev.Msg("peer group comparing its members")
		} else {
			ev.Msg("peer group has fewer than two usable members: members judged on their own signal")
		}
	}
	at := k*g.width + g.width/2
	for i, d := range g.devs {
		m := g.members[i]
		m.closed = m.closed[:0]
		if !d.Live || d.Own {
			continue
		}
		if mask := m.sensor.Closes(at); mask != 0 {
			for win := range m.sensor.Windows() {
				if mask&(1<<uint(win)) != 0 {
					sol := m.sensor.SolveJudged(win)
					if sol.Parabola.SerialErr != nil && sol.Parabola.Pairs < rolling.MinPairs {
						// A deviation fit holds one value a bucket, too few
						// to estimate their own correlation. The member's
						// own readings are no guide: their correlation is
						// mostly the process swings the deviation cancels,
						// and taking it left no effective reading to judge.
						// The bucket means of a deviation are taken as
						// independent (r1 = 0): a known limit, see the
						// README's peer groups.
						sol = sol.WithSerial(0, rolling.MinPairs)
					}
					m.closed = append(m.closed, peerClose{sol: sol})
					c := &m.closed[len(m.closed)-1]
					c.judged = w.judgePeer(m.ref, &c.sol, usable)
				}
			}
		}
		if m.sensor.Add(rolling.Reading{UnixNano: at, Value: d.Value}) == nil {
			m.dirty = true
			w.mark(m.ref)
		}
	}
	w.attribute(g, n)
}

// attribute decides, for every window whose pane closed in the bucket
// just compared and every fit kind, which members a deviation breach
// belongs to, and opens the tickets of the attributed members whose own
// rule has that kind among its ticket kinds.
func (w *worker) attribute(g *peerGroup, n int) {
	var buf [4]rolling.WindowSpec
	specs := buf[:0]
	for _, m := range g.members {
		for ci := range m.closed {
			if s := m.closed[ci].sol.Window; !slices.Contains(specs, s) {
				specs = append(specs, s)
			}
		}
	}
	for _, spec := range specs {
		for _, k := range alert.Kinds() {
			if k.FitKind() {
				w.attributeKind(g, n, spec, k)
			}
		}
	}
	for _, m := range g.members {
		m.closed = m.closed[:0]
	}
}

// attributeKind runs Attribute for one window and kind.
func (w *worker) attributeKind(g *peerGroup, n int, spec rolling.WindowSpec, k alert.Kind) {
	g.ev = g.ev[:0]
	for i, m := range g.members {
		var ev alert.PeerEvidence
		ev.InReference = g.live[i] && g.use[i]
		if c := m.closedWindow(spec); c != nil {
			ev.Judged = c.judged
			if e := w.entry(m.ref, true); e != nil {
				ev.Breach = breaching(e.tr, spec, k)
			}
		}
		ev.Own = m.ref.st.ownEvidence()
		g.ev = append(g.ev, ev)
	}
	g.outcomes = alert.Attribute(g.outcomes, g.ev)
	for i, m := range g.members {
		c := m.closedWindow(spec)
		if c == nil {
			continue
		}
		o := g.outcomes[i]
		key := peerOutcomeKey{spec, k}
		if prev := m.outcome[key]; prev != o && (notable(prev) || notable(o)) {
			w.s.log.Info().Str("sensor", m.ref.id).Str("group", g.name).Str("window", alert.WindowName(spec)).
				Str("kind", k.String()).Str("outcome", o.String()).Str("was", prev.String()).Int("members", n).Msg("peer attribution changed")
		}
		m.outcome[key] = o
		if o != alert.PeerAttributed {
			continue
		}
		e := w.entry(m.ref, true)
		if e == nil || !slices.Contains(e.ticketKinds, k) {
			continue
		}
		d, err := e.tr.OpenTicket(c.sol.Last, &c.sol, k)
		if err != nil {
			w.s.badLog.Warn().Str("sensor", m.ref.id).Err(err).Msg("peer ticket")
			continue
		}
		if d.Opened != nil {
			w.decided(m.ref, e, d)
		}
	}
}

// notable says an outcome is worth a log line when it starts or ends.
func notable(o alert.PeerOutcome) bool {
	return o == alert.PeerAttributed || o == alert.PeerPairDisagreement || o == alert.PeerAmbiguous
}

func (m *peerMember) closedWindow(spec rolling.WindowSpec) *peerClose {
	for i := range m.closed {
		if m.closed[i].sol.Window == spec {
			return &m.closed[i]
		}
	}
	return nil
}

// breaching reports whether the tracker's alert of kind k on window spec
// is pending or firing.
func breaching(tr *alert.Tracker, spec rolling.WindowSpec, k alert.Kind) bool {
	for _, st := range tr.Alerts() {
		if st.Window == spec && st.Kind == k {
			return st.State == alert.Pending || st.State == alert.Firing
		}
	}
	return false
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
