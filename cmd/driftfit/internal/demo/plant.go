// Package demo is Quillmere Vale, an invented process plant: its
// sensors and their invented behaviours, a generator of their readings
// (as CSV, or published to NATS as the service reads them), and a board
// that logs the sensors whose drift stands out while the demo runs.
package demo

import (
	"fmt"
	"math"
	"math/rand/v2"
	"time"
)

// The demo plant is Quillmere Vale, an invented process plant with four
// units; configs/demo.yaml describes its sensor classes and limits. The
// behaviours below are invented for demonstration only.

// behaviour is what a demo sensor's true value does over time.
type behaviour uint8

const (
	stable       behaviour = iota
	linearDrift            // rate per day
	acceleration           // rate per day² (slope grows)
	growth                 // doubling time in days
	processStep            // the process (whole group) steps at day 20
)

func (b behaviour) String() string {
	return [...]string{"stable", "linear drift", "accelerating drift", "exponential growth", "process step"}[b]
}

// Sensor is one sensor of the demo plant.
type Sensor struct {
	ID     string
	Level  float64 // typical reading, engineering units
	noise  float64 // standard deviation of the reading noise
	swing  float64 // amplitude of the daily process swing
	kind   behaviour
	amount float64 // rate, acceleration or doubling time (see behaviour)
}

// Value returns the sensor's reading at d days after the plant's start,
// its noise drawn from rng.
func (s *Sensor) Value(d float64, rng *rand.Rand) float64 {
	v := s.Level + s.swing*math.Sin(2*math.Pi*d) + s.noise*rng.NormFloat64()
	switch s.kind {
	case linearDrift:
		v += s.amount * d
	case acceleration:
		v += s.amount * d * d
	case growth:
		v = (v - s.Level) + s.Level*math.Exp2(d/s.amount)
	case processStep:
		if d >= 20 {
			v += s.amount
		}
	}
	return v
}

// Plant returns the sensors of the demo plant, 360 in all, in a fixed
// order; a handful misbehave so a newcomer has something to find.
func Plant() []Sensor {
	var out []Sensor
	add := func(s Sensor) { out = append(out, s) }
	for u := 1; u <= 4; u++ {
		for ai, area := range []string{"steam", "feed", "reactor"} {
			for i := 1; i <= 10; i++ {
				add(Sensor{ID: fmt.Sprintf("qm.u%d.%s.pt-1%02d", u, area, i), Level: []float64{1000, 600, 1500}[ai], noise: 1.5, swing: 6})
			}
		}
		for _, area := range []string{"feed", "reactor"} {
			for i := 1; i <= 10; i++ {
				add(Sensor{ID: fmt.Sprintf("qm.u%d.%s.tt-2%02d", u, area, i), Level: 180, noise: 0.08, swing: 0.5})
			}
		}
	}
	for u := 1; u <= 2; u++ {
		for i := 1; i <= 30; i++ {
			add(Sensor{ID: fmt.Sprintf("qm.u%d.furnace.te-3%02d", u, i), Level: 850, noise: 0.6, swing: 3})
		}
	}
	for u := 1; u <= 4; u++ {
		for _, area := range []string{"feed", "product"} {
			for i := 1; i <= 5; i++ {
				add(Sensor{ID: fmt.Sprintf("qm.u%d.%s.ft-4%02d", u, area, i), Level: 250, noise: 1.2, swing: 8})
			}
		}
		for _, area := range []string{"pumpbay", "compressor", "tankfarm"} {
			for i := 1; i <= 3; i++ {
				add(Sensor{ID: fmt.Sprintf("qm.u%d.%s.gd-5%02d", u, area, i), Level: 0.5, noise: 0.3})
			}
		}
		for _, area := range []string{"pumps", "compressor"} {
			for i := 1; i <= 3; i++ {
				add(Sensor{ID: fmt.Sprintf("qm.u%d.%s.vt-6%02d", u, area, i), Level: 2.5, noise: 0.15})
			}
		}
	}
	misbehave := map[string]func(*Sensor){
		"qm.u1.steam.pt-102":      func(s *Sensor) { s.kind, s.amount = linearDrift, 0.12 },    // kPa/day
		"qm.u3.feed.pt-107":       func(s *Sensor) { s.kind, s.amount = linearDrift, -0.08 },   // kPa/day
		"qm.u2.reactor.tt-204":    func(s *Sensor) { s.kind, s.amount = acceleration, 0.0015 }, // degC/day²
		"qm.u1.furnace.te-305":    func(s *Sensor) { s.kind, s.amount = acceleration, 0.004 },  // degC/day²
		"qm.u4.product.ft-403":    func(s *Sensor) { s.kind, s.amount = linearDrift, 0.09 },    // m3/h/day
		"qm.u2.pumpbay.gd-502":    func(s *Sensor) { s.kind, s.amount = linearDrift, 0.12 },    // %LEL/day
		"qm.u4.compressor.vt-601": func(s *Sensor) { s.kind, s.amount = growth, 30 },           // doubling days
	}
	for i := range out {
		if f, ok := misbehave[out[i].ID]; ok {
			f(&out[i])
		}
		// The u1 furnace zone A steps up together: a process change,
		// not drift, which peer comparison should see through.
		if len(out[i].ID) == len("qm.u1.furnace.te-301") && out[i].ID[:len("qm.u1.furnace.te-30")] == "qm.u1.furnace.te-30" && out[i].kind == stable {
			out[i].kind, out[i].amount = processStep, 15
		}
	}
	return out
}

// Fleet returns n demo sensors: the plant's 360 (all of them for n ≤ 0),
// then as many copies as needed under extension units "qm.xK." for load
// tests.
func Fleet(n int) []Sensor {
	base := Plant()
	if n <= 0 {
		return base
	}
	out := make([]Sensor, 0, n)
	for k := 0; len(out) < n; k++ {
		for _, s := range base {
			if len(out) == n {
				break
			}
			if k > 0 {
				s.ID = fmt.Sprintf("qm.x%d.%s", k, s.ID[len("qm."):])
			}
			out = append(out, s)
		}
	}
	return out
}

// Start is the default start of demo data: a fixed date keeps demo
// files reproducible.
var Start = time.Date(2026, 1, 5, 0, 0, 0, 0, time.UTC)
