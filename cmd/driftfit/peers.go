package main

import (
	"sync"

	"github.com/rs/zerolog"

	"driftfit/alert"
	"driftfit/configs"
	"driftfit/rolling"
)

// peers turns the readings of peer-group members into each member's
// deviation from the median of the other members, on common time buckets,
// and fits that deviation in a sensor of its own whose pane closes feed
// the member's peer alert rule. A change of the process moves the whole
// group and cancels; a drifting member stands out.
//
// While a group has fewer than two live members in a bucket there is no
// one to compare with: its members are judged on their own signal (the
// raw fits) until two are live again, and the change is logged.
//
// Lock order: peers.mu, then peerGroup.mu, then the alerter's locks.
type peers struct {
	cfg    *configs.Config
	alerts *alerter
	log    zerolog.Logger

	// memberOf maps id → *peerGroup (nil: not a member). It is read for
	// every message on the workers, so reads take no lock; mu guards
	// first sight of an id and groups.
	memberOf sync.Map
	mu       sync.Mutex
	groups   map[string]*peerGroup
}

type peerGroup struct {
	name string

	mu        sync.Mutex
	width     int64 // bucket width, ns: the member class's shortest pane
	members   []*peerMember
	index     map[string]int
	buckets   map[int64][]peerSum // bucket index → per member sums
	newest    int64               // newest reading time seen, Unix ns
	finalized int64               // buckets up to this index are done
	started   bool
	comparing bool // the last finalized bucket had two or more live members
	devs      []alert.Deviation
}

type peerMember struct {
	id     string
	sensor *rolling.Sensor // the deviation signal
}

type peerSum struct {
	sum float64
	n   int
}

func newPeers(cfg *configs.Config, alerts *alerter, log zerolog.Logger) *peers {
	return &peers{cfg: cfg, alerts: alerts, log: log.With().Str("component", "peers").Logger(),
		groups: map[string]*peerGroup{}}
}

// group returns the peer group of id (joining it on first sight), or nil.
func (p *peers) group(id string) *peerGroup {
	if g, ok := p.memberOf.Load(id); ok {
		return g.(*peerGroup)
	}
	p.mu.Lock()
	defer p.mu.Unlock()
	if g, ok := p.memberOf.Load(id); ok {
		return g.(*peerGroup)
	}
	var g *peerGroup
	c, err := p.cfg.ClassFor(id)
	if err == nil && c.Group != "" && len(c.Windows) > 0 {
		g = p.groups[c.Group]
		if g == nil {
			w := c.Windows[0].Pane
			for _, win := range c.Windows {
				w = min(w, win.Pane)
			}
			g = &peerGroup{name: c.Group, width: int64(w), index: map[string]int{}, buckets: map[int64][]peerSum{}}
			p.groups[c.Group] = g
		}
		specs := make([]rolling.WindowSpec, len(c.Windows))
		for i, win := range c.Windows {
			specs[i] = rolling.WindowSpec{Span: win.Span, Pane: win.Pane}
		}
		s, err := rolling.NewSensor(specs...)
		if err != nil {
			g = nil
		} else {
			g.mu.Lock()
			g.index[id] = len(g.members)
			g.members = append(g.members, &peerMember{id: id, sensor: s})
			for k, sums := range g.buckets {
				g.buckets[k] = append(sums, peerSum{})
			}
			g.mu.Unlock()
		}
	}
	p.memberOf.Store(id, g)
	return g
}

// comparing reports whether id is judged against its peers now.
func (p *peers) comparing(id string) bool {
	g := p.group(id)
	if g == nil {
		return false
	}
	g.mu.Lock()
	defer g.mu.Unlock()
	return g.comparing
}

// applied takes a sensor's newly applied readings (the ingest hook).
func (p *peers) applied(id string, readings []rolling.Reading) {
	g := p.group(id)
	if g == nil {
		return
	}
	g.mu.Lock()
	defer g.mu.Unlock()
	i := g.index[id]
	for _, r := range readings {
		k := floorDivInt(r.UnixNano, g.width)
		if g.started && k <= g.finalized {
			continue // its bucket is already compared
		}
		sums := g.buckets[k]
		if sums == nil {
			sums = make([]peerSum, len(g.members))
			g.buckets[k] = sums
		}
		sums[i].sum += r.Value
		sums[i].n++
		if !g.started {
			g.finalized, g.started = k-1, true
		}
		g.newest = max(g.newest, r.UnixNano)
	}
	// A bucket is compared once readings a whole bucket later arrived,
	// so members reporting a little late still count.
	for last := floorDivInt(g.newest, g.width) - 2; g.finalized < last; {
		g.finalized++
		p.compare(g, g.finalized)
	}
}

// compare computes the deviations of bucket k and feeds them to the
// members' deviation sensors. The caller holds g.mu.
func (p *peers) compare(g *peerGroup, k int64) {
	sums, ok := g.buckets[k]
	if !ok {
		return
	}
	delete(g.buckets, k)
	vals := make([]float64, len(sums))
	live := make([]bool, len(sums))
	nlive := 0
	for i, s := range sums {
		if s.n > 0 {
			vals[i], live[i] = s.sum/float64(s.n), true
			nlive++
		}
	}
	var err error
	if g.devs, err = alert.Deviations(g.devs, vals, live); err != nil {
		p.log.Warn().Str("group", g.name).Err(err).Msg("peer comparison skipped")
		return
	}
	if now := nlive >= 2; now != g.comparing {
		g.comparing = now
		ev := p.log.Info().Str("group", g.name).Int("live", nlive)
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
			for w := range m.sensor.Windows() {
				if mask&(1<<uint(w)) != 0 {
					sol := m.sensor.Solve(w)
					p.alerts.evaluatePeers(m.id, g.name, &sol)
				}
			}
		}
		_ = m.sensor.Add(rolling.Reading{UnixNano: at, Value: d.Value})
	}
}

func floorDivInt(a, b int64) int64 {
	q := a / b
	if a%b != 0 && a < 0 {
		q--
	}
	return q
}
