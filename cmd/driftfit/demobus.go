package main

import (
	"context"
	"math/rand/v2"
	"strconv"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/ingest"
	"driftfit/rolling"
)

// demoOptions configure publishDemo.
type demoOptions struct {
	prefix   string        // subject prefix; readings go to <prefix>.<id>
	sensors  int           // fleet size (0: the plant's 360)
	backfill time.Duration // plant time published before now, compressed
	wall     time.Duration // wall time the backfill takes
	every    time.Duration // plant time between readings of one sensor
	live     bool          // after the backfill, publish a reading per sensor every liveEvery
	seed     uint64
	batch    int     // readings of one sensor per message (consecutive steps); 0 or 1: single readings
	rate     float64 // readings per second during the backfill; 0: as set by wall
	bad      bool    // send bursts of bad messages
}

// liveEvery is the wall (and plant) time between live demo readings.
const liveEvery = 10 * time.Second

func (o *demoOptions) fill() {
	if o.prefix == "" {
		o.prefix = "driftfit.in"
	}
	if o.backfill <= 0 {
		o.backfill = 30 * 24 * time.Hour
	}
	if o.wall <= 0 {
		o.wall = time.Minute
	}
	if o.every <= 0 {
		o.every = time.Hour
	}
	if o.seed == 0 {
		o.seed = 1
	}
}

// publishDemo publishes the demo plant's readings: the last o.backfill of
// plant time compressed into o.wall, ending at the present, then (if
// o.live) one reading per sensor every liveEvery. Every 100th step it
// also sends a burst of bad messages, one of each kind the service
// rejects, so the dead-letter subject and its counters have something
// to show.
func publishDemo(ctx context.Context, nc *nats.Conn, o demoOptions, log zerolog.Logger) error {
	o.fill()
	plant := demoFleet(o.sensors)
	rng := rand.New(rand.NewPCG(o.seed, 0))
	start := time.Now().Add(-o.backfill).Truncate(o.every)
	steps := int(o.backfill / o.every)
	pause := o.wall / time.Duration(max(steps, 1))
	log = log.With().Str("component", "demo").Logger()
	log.Info().Int("sensors", len(plant)).Dur("plant_time", o.backfill).Dur("wall_time", o.wall).Msg("demo feed started")
	if o.rate > 0 {
		pause = time.Duration(float64(time.Second) * float64(len(plant)) / o.rate)
	}
	batch := max(o.batch, 1)
	var buf []byte
	var rs []rolling.Reading
	publishBatch := func(step, n int) error {
		for i := range plant {
			s := &plant[i]
			rs = rs[:0]
			for j := range n {
				at := start.Add(time.Duration(step+j) * o.every)
				rs = append(rs, rolling.Reading{UnixNano: at.UnixNano(), Value: s.value(at.Sub(start).Hours()/24, rng)})
			}
			if n == 1 {
				buf = ingest.AppendReading(buf[:0], ingest.Decoded{Reading: rs[0]})
			} else {
				buf = ingest.AppendBatch(buf[:0], s.id, rs)
			}
			if err := nc.Publish(o.prefix+"."+s.id, buf); err != nil {
				return err
			}
		}
		return nil
	}
	publish := func(at time.Time) error {
		d := at.Sub(start).Hours() / 24
		for i := range plant {
			s := &plant[i]
			buf = ingest.AppendReading(buf[:0], ingest.Decoded{Reading: rolling.Reading{UnixNano: at.UnixNano(), Value: s.value(d, rng)}})
			if err := nc.Publish(o.prefix+"."+s.id, buf); err != nil {
				return err
			}
		}
		return nil
	}
	tick := time.NewTicker(max(pause, time.Millisecond))
	defer tick.Stop()
	for step := 0; step < steps; step += batch {
		n := min(batch, steps-step)
		if err := publishBatch(step, n); err != nil {
			return err
		}
		if o.bad && step/100 != (step+n)/100 {
			publishBad(nc, o.prefix, plant[0].id)
		}
		for range n {
			select {
			case <-ctx.Done():
				return ctx.Err()
			case <-tick.C:
			}
		}
	}
	if err := nc.Flush(); err != nil {
		return err
	}
	log.Info().Int("steps", steps).Msg("demo backfill published")
	if !o.live {
		return nil
	}
	live := time.NewTicker(liveEvery)
	defer live.Stop()
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case now := <-live.C:
			if err := publish(now); err != nil {
				return err
			}
		}
	}
}

// publishBad sends one message of each kind of bad input.
func publishBad(nc *nats.Conn, prefix, id string) {
	now := strconv.FormatInt(time.Now().Unix(), 10)
	future := strconv.FormatInt(time.Now().Add(48*time.Hour).Unix(), 10)
	for _, payload := range []string{
		`{"t": ` + now + `, "v": `,                                      // malformed JSON
		`{"t": ` + now + `}`,                                            // missing value
		`{"t": "yesterday", "v": 1}`,                                    // bad time
		`{"t": ` + now + `, "v": 1e999}`,                                // non-finite
		`{"t": ` + future + `, "v": 1}`,                                 // future time
		`{"t": ` + now + `, "v": 1, "unit": "psi"}`,                     // unit mismatch (a kPa sensor)
		`[{"t": ` + now + `, "v": 1000}, {"t": ` + now + `, "v": "x"}]`, // one good, one of the wrong type
		`{"t": 946684800, "v": 1}`,                                      // older than every window
	} {
		_ = nc.Publish(prefix+"."+id, []byte(payload))
	}
}
