package main

import (
	"bufio"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"math/rand/v2"
	"os"
	"strconv"
	"time"

	"github.com/nats-io/nats.go"

	"driftfit/configs"
)

func runDemoFeed(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("demo-feed", flag.ContinueOnError)
	fs.SetOutput(stderr)
	csvOut := fs.String("csv", "", "write the readings as CSV to `FILE` (- for standard output)")
	days := fs.String("days", "30d", "plant time covered, from --start")
	every := fs.String("every", "1h", "plant time between two readings of one sensor")
	start := fs.String("start", demoStart.Format(time.RFC3339), "plant time of the first reading (RFC 3339)")
	sensors := fs.Int("sensors", 0, "sensors to generate: the first N of the plant's 360, or more in copies of its units (0: the 360)")
	seed := fs.Uint64("seed", 1, "random seed of the reading noise")
	servers := fs.String("servers", "", "publish to the NATS server at `URL` (e.g. nats://127.0.0.1:4222) instead of writing CSV")
	prefix := fs.String("prefix", "driftfit.in", "subject prefix: readings go to PREFIX.<sensor id>")
	wall := fs.String("wall", "1m", "with --servers: wall time over which --days of plant time, ending now, are published")
	rate := fs.Float64("rate", 0, "with --servers: readings per second instead of --wall (0: use --wall)")
	batch := fs.Int("batch", 1, "with --servers: readings of one sensor per message")
	live := fs.Bool("live", false, "with --servers: after the backfill, keep publishing one reading per sensor every 10s")
	bad := fs.Bool("bad", true, "with --servers: send a burst of bad messages every 100 steps")
	fs.Usage = func() {
		fmt.Fprintln(stderr, "Usage: driftfit demo-feed [flags]\n\nGenerates readings of Quillmere Vale, an invented plant: most sensors stable,\na few drifting (linear, accelerating), one vibration growing exponentially and\na furnace zone whose process steps up on day 20. Writes them as CSV (--csv),\nor publishes them to NATS (--servers): --days of plant time ending now,\ncompressed into --wall (or at --rate), optionally continuing live.\n\nFlags:")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		return err
	}
	span, err := configs.ParseDuration(*days)
	if err != nil || span <= 0 {
		return usageError("--days %q: want a positive duration such as 30d", *days)
	}
	step, err := configs.ParseDuration(*every)
	if err != nil || step <= 0 {
		return usageError("--every %q: want a positive duration such as 1h", *every)
	}
	t0, err := time.Parse(time.RFC3339, *start)
	if err != nil {
		return usageError("--start %q: %v", *start, err)
	}
	if *servers != "" {
		w, err := configs.ParseDuration(*wall)
		if err != nil || w <= 0 {
			return usageError("--wall %q: want a positive duration such as 1m", *wall)
		}
		if *batch < 1 {
			return usageError("--batch %d: want 1 or more", *batch)
		}
		nc, err := nats.Connect(*servers, nats.Name("driftfit demo-feed"))
		if err != nil {
			return err
		}
		defer nc.Close()
		log, _ := newLogger(stderr, "console", "info")
		err = publishDemo(ctx, nc, demoOptions{prefix: *prefix, sensors: *sensors, backfill: span, wall: w, every: step,
			live: *live, seed: *seed, batch: *batch, rate: *rate, bad: *bad}, log)
		if err != nil && !errors.Is(err, context.Canceled) {
			return err
		}
		return nc.Flush()
	}
	plant := demoFleet(*sensors)
	if *csvOut == "" {
		return usageError("give --csv FILE or --servers URL")
	}
	out := stdout
	if *csvOut != "-" {
		f, err := os.Create(*csvOut)
		if err != nil {
			return err
		}
		defer f.Close()
		out = f
	}
	w := bufio.NewWriterSize(out, 64<<10)
	rng := rand.New(rand.NewPCG(*seed, 0))
	fmt.Fprintln(w, "sensor,time,value")
	var line []byte
	for t := time.Duration(0); t < span; t += step {
		if ctx.Err() != nil {
			return ctx.Err()
		}
		d := t.Hours() / 24
		at := t0.Add(t).Unix()
		for i := range plant {
			s := &plant[i]
			line = append(line[:0], s.id...)
			line = append(line, ',')
			line = strconv.AppendInt(line, at, 10)
			line = append(line, ',')
			line = strconv.AppendFloat(line, s.value(d, rng), 'g', 8, 64)
			line = append(line, '\n')
			if _, err := w.Write(line); err != nil {
				return err
			}
		}
	}
	return w.Flush()
}
