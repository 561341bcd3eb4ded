package main

import (
	"bufio"
	"context"
	"flag"
	"fmt"
	"io"
	"math/rand/v2"
	"os"
	"strconv"
	"time"

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
	fs.Usage = func() {
		fmt.Fprintln(stderr, "Usage: driftfit demo-feed [flags]\n\nGenerates readings of Quillmere Vale, an invented plant: most sensors stable,\na few drifting (linear, accelerating), one vibration growing exponentially and\na furnace zone whose process steps up on day 20.\n\nFlags:")
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
	plant := demoFleet(*sensors)
	if *csvOut == "" {
		return usageError("give --csv FILE")
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
