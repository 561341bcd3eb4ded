package main

import (
	"context"
	"io"
	"os"
	"time"

	"driftfit/cmd/driftfit/internal/demo"
	"driftfit/configs"
)

const demoFeedHelp = `Usage: driftfit demo-feed [flags]

Generates readings of Quillmere Vale, an invented plant: most sensors stable,
a few drifting (linear, accelerating), one vibration growing exponentially and
a furnace zone whose process steps up on day 20. Writes them as CSV (--csv),
or publishes them to NATS (--servers): --days of plant time ending now,
compressed into --wall (or at --rate), optionally continuing live.`

func runDemoFeed(ctx context.Context, args []string, _ io.Reader, stdout, stderr io.Writer) error {
	fs := newFlags("demo-feed", demoFeedHelp)
	csvOut := fs.String("csv", "", "write the readings as CSV to `FILE` (- for standard output)")
	days := fs.String("days", "30d", "plant time covered, from --start")
	every := fs.String("every", "1h", "plant time between two readings of one sensor")
	start := fs.String("start", demo.Start.Format(time.RFC3339), "plant time of the first reading (RFC 3339)")
	sensors := fs.Int("sensors", 0, "sensors to generate: the first N of the plant's 360, or more in copies of its units (0: the 360)")
	seed := fs.Uint64("seed", 1, "random seed of the reading noise")
	servers := fs.String("servers", "", "publish to the NATS server at `URL` (e.g. nats://127.0.0.1:4222) instead of writing CSV")
	prefix := fs.String("prefix", "driftfit.in", "subject prefix: readings go to PREFIX.<sensor id>")
	wall := fs.String("wall", "1m", "with --servers: wall time over which --days of plant time, ending now, are published")
	rate := fs.Float64("rate", 0, "with --servers: readings per second instead of --wall (0: use --wall)")
	batch := fs.Int("batch", 1, "with --servers: readings of one sensor per message")
	live := fs.Bool("live", false, "with --servers: after the backfill, keep publishing one reading per sensor every 10s")
	bad := fs.Bool("bad", true, "with --servers: send a burst of bad messages every 100 steps")
	if pos, err := fs.parse(args); err != nil || len(pos) != 0 {
		if err != nil {
			return err
		}
		return usageError("unexpected arguments %q", pos)
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
		return usageError("--start %q: want an RFC 3339 time such as 2026-01-05T00:00:00Z", *start)
	}
	if *servers != "" {
		w, err := configs.ParseDuration(*wall)
		if err != nil || w <= 0 {
			return usageError("--wall %q: want a positive duration such as 1m", *wall)
		}
		if *batch < 1 {
			return usageError("--batch %d: want 1 or more", *batch)
		}
		log, _ := newLogger(stderr, "console", "info")
		return demo.PublishTo(ctx, *servers, demo.Options{Prefix: *prefix, Sensors: *sensors, Backfill: span, Wall: w, Every: step,
			Live: *live, Seed: *seed, Batch: *batch, Rate: *rate, Bad: *bad}, log)
	}
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
	return demo.WriteCSV(ctx, out, demo.CSVOptions{Sensors: *sensors, Span: span, Every: step, Start: t0, Seed: *seed})
}
