package demo

import (
	"bytes"
	"context"
	"math/rand/v2"
	"strconv"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"driftfit/ingest"
	"driftfit/rolling"
)

// Options configure Publish. Zero fields take the defaults given.
type Options struct {
	Prefix   string        // subject prefix; readings go to <prefix>.<id> (default driftfit.in)
	Sensors  int           // fleet size (0: the plant's 360)
	Backfill time.Duration // plant time published before now, compressed (default 30 days)
	Wall     time.Duration // wall time the backfill takes (default 1 minute)
	Every    time.Duration // plant time between readings of one sensor (default 1 hour)
	Live     bool          // after the backfill, publish a reading per sensor every LiveEvery
	Seed     uint64        // seed of the reading noise (default 1)
	Batch    int           // readings of one sensor per message (consecutive steps); 0 or 1: single readings
	Rate     float64       // readings per second during the backfill; 0: as set by Wall
	Bad      bool          // send bursts of bad messages
}

// LiveEvery is the wall (and plant) time between live demo readings.
const LiveEvery = 10 * time.Second

func (o *Options) fill() {
	if o.Prefix == "" {
		o.Prefix = "driftfit.in"
	}
	if o.Backfill <= 0 {
		o.Backfill = 30 * 24 * time.Hour
	}
	if o.Wall <= 0 {
		o.Wall = time.Minute
	}
	if o.Every <= 0 {
		o.Every = time.Hour
	}
	if o.Seed == 0 {
		o.Seed = 1
	}
}

// demoStreamWait is how long Publish waits for a JetStream stream to
// capture its subjects (serve makes it as it starts) before it publishes
// with core NATS.
const demoStreamWait = 5 * time.Second

// demoAckWindow is the most JetStream publishes that may await their
// acknowledgement at once; demoPublisher halves its window after a
// refusal and doubles it (up to this) after a window with none.
const demoAckWindow = 1024

// demoStall is how many rounds in a row may take none of the refused
// readings before they are given up: the stream is full ("maximum bytes
// exceeded") and serve is not draining it.
const demoStall = 8

// demoPublisher publishes readings with JetStream acknowledgements when a
// stream captures them, so a reading the stream could not take is seen
// and sent again instead of lost; else with core NATS. The server refuses
// with "429 Too Many Requests" while its stream ingest queue is full:
// fewer publishes in flight, and those refused sent again, get them all
// in.
type demoPublisher struct {
	nc      *nats.Conn
	js      jetstream.JetStream // nil: core NATS
	window  int
	pending []jetstream.PubAckFuture
	refused int // readings given up
	log     zerolog.Logger
}

func newDemoPublisher(ctx context.Context, nc *nats.Conn, subject string, log zerolog.Logger) *demoPublisher {
	p := &demoPublisher{nc: nc, log: log, window: demoAckWindow}
	js, err := jetstream.New(nc)
	if err != nil {
		return p
	}
	deadline := time.Now().Add(demoStreamWait)
	for {
		name, err := js.StreamNameBySubject(ctx, subject)
		if err == nil && name != "" {
			p.js = js
			log.Info().Str("stream", name).Msg("demo feed publishes with JetStream acknowledgements")
			return p
		}
		if time.Now().After(deadline) || ctx.Err() != nil {
			log.Info().Msg("no stream takes the demo readings: publishing with core NATS")
			return p
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// publish sends one reading; data may be reused once it returns.
func (p *demoPublisher) publish(ctx context.Context, subject string, data []byte) error {
	if p.js == nil {
		return p.nc.Publish(subject, data)
	}
	return p.send(ctx, &nats.Msg{Subject: subject, Data: bytes.Clone(data)})
}

func (p *demoPublisher) send(ctx context.Context, m *nats.Msg) error {
	f, err := p.js.PublishMsgAsync(m)
	if err != nil {
		return err
	}
	p.pending = append(p.pending, f)
	if len(p.pending) >= p.window {
		return p.wait(ctx)
	}
	return nil
}

// wait waits for every pending acknowledgement and sends the refused
// readings again, a halved window at a time, until all are taken or
// demoStall rounds in a row took none (those are logged and counted in
// refused). A refused reading thus arrives late, by a few steps of the
// fleet at most, which the service accepts.
func (p *demoPublisher) wait(ctx context.Context) error {
	if p.js == nil {
		return p.nc.Flush()
	}
	queue := p.settle(ctx, nil)
	if len(queue) == 0 {
		p.window = min(demoAckWindow, 2*p.window)
	}
	var last error
	for stall := 0; len(queue) > 0; {
		if ctx.Err() != nil {
			return ctx.Err()
		}
		p.window = max(1, p.window/2)
		n := min(len(queue), p.window)
		for _, m := range queue[:n] {
			f, err := p.js.PublishMsgAsync(m)
			if err != nil {
				return err
			}
			p.pending = append(p.pending, f)
		}
		failed := p.settle(ctx, &last)
		queue = append(failed, queue[n:]...)
		if len(failed) < n {
			stall = 0
			continue
		}
		if stall++; stall == demoStall {
			p.refused += len(queue)
			p.log.Warn().Err(last).Int("readings", len(queue)).Int("refused", p.refused).Msg("demo readings refused by the stream")
			return nil
		}
		select {
		case <-time.After(time.Duration(stall) * 50 * time.Millisecond):
		case <-ctx.Done():
			return ctx.Err()
		}
	}
	return nil
}

// settle waits for the pending acknowledgements and returns the readings
// refused, setting *last (if not nil) to a refusal.
func (p *demoPublisher) settle(ctx context.Context, last *error) []*nats.Msg {
	select {
	case <-p.js.PublishAsyncComplete():
	case <-ctx.Done():
	}
	var failed []*nats.Msg
	for _, f := range p.pending {
		select {
		case err := <-f.Err():
			failed = append(failed, f.Msg())
			if last != nil {
				*last = err
			}
		default:
		}
	}
	clear(p.pending)
	p.pending = p.pending[:0]
	return failed
}

// Publish publishes the demo plant's readings on nc: the last o.Backfill of
// plant time compressed into o.Wall, ending at the present, then (if
// o.Live) one reading per sensor every LiveEvery. Every 100th step it
// also sends a burst of bad messages, one of each kind the service
// rejects, so the dead-letter subject and its counters have something
// to show. When a JetStream stream captures the readings (serve's stream
// mode), readings are published with acknowledgements: a flood of core
// publishes overruns the server's stream ingest, which drops messages
// with only a warning in its log.
func Publish(ctx context.Context, nc *nats.Conn, o Options, log zerolog.Logger) error {
	o.fill()
	plant := Fleet(o.Sensors)
	rng := rand.New(rand.NewPCG(o.Seed, 0))
	start := time.Now().Add(-o.Backfill).Truncate(o.Every)
	steps := int(o.Backfill / o.Every)
	pause := o.Wall / time.Duration(max(steps, 1))
	log = log.With().Str("component", "demo").Logger()
	log.Info().Int("sensors", len(plant)).Dur("plant_time", o.Backfill).Dur("wall_time", o.Wall).Msg("demo feed started")
	if o.Rate > 0 {
		pause = time.Duration(float64(time.Second) * float64(len(plant)) / o.Rate)
	}
	batch := max(o.Batch, 1)
	pub := newDemoPublisher(ctx, nc, o.Prefix+"."+plant[0].ID, log)
	var buf []byte
	var rs []rolling.Reading
	publishBatch := func(step, n int) error {
		for i := range plant {
			s := &plant[i]
			rs = rs[:0]
			for j := range n {
				at := start.Add(time.Duration(step+j) * o.Every)
				rs = append(rs, rolling.Reading{UnixNano: at.UnixNano(), Value: s.Value(at.Sub(start).Hours()/24, rng)})
			}
			if n == 1 {
				buf = ingest.AppendReading(buf[:0], ingest.Decoded{Reading: rs[0]})
			} else {
				buf = ingest.AppendBatch(buf[:0], s.ID, rs)
			}
			if err := pub.publish(ctx, o.Prefix+"."+s.ID, buf); err != nil {
				return err
			}
		}
		return nil
	}
	publish := func(at time.Time) error {
		d := at.Sub(start).Hours() / 24
		for i := range plant {
			s := &plant[i]
			buf = ingest.AppendReading(buf[:0], ingest.Decoded{Reading: rolling.Reading{UnixNano: at.UnixNano(), Value: s.Value(d, rng)}})
			if err := pub.publish(ctx, o.Prefix+"."+s.ID, buf); err != nil {
				return err
			}
		}
		return pub.wait(ctx)
	}
	tick := time.NewTicker(max(pause, time.Millisecond))
	defer tick.Stop()
	for step := 0; step < steps; step += batch {
		n := min(batch, steps-step)
		if err := publishBatch(step, n); err != nil {
			return err
		}
		if o.Bad && step/100 != (step+n)/100 {
			publishBad(nc, o.Prefix, plant[0].ID, start.Add(time.Duration(step+n-1)*o.Every))
		}
		for range n {
			select {
			case <-ctx.Done():
				return ctx.Err()
			case <-tick.C:
			}
		}
	}
	if err := pub.wait(ctx); err != nil {
		return err
	}
	log.Info().Int("steps", steps).Int("refused", pub.refused).Msg("demo backfill published")
	if !o.Live {
		return nil
	}
	live := time.NewTicker(LiveEvery)
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

// publishBad sends one message of each kind of bad input, stamped at
// plant time at (the time of the newest readings published). A reading
// stamped with the wall clock during the backfill would lie weeks ahead
// of the rest of its sensor and move its windows past every reading
// still to come. The future time is the wall clock's, as the service
// judges it.
func publishBad(nc *nats.Conn, prefix, id string, at time.Time) {
	now := strconv.FormatInt(at.Unix(), 10)
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
