package main

import (
	"context"
	"encoding/json"
	"io"
	"os"
	"runtime/pprof"
	"time"

	"github.com/rs/zerolog"

	"driftfit/cmd/driftfit/internal/bench"
	"driftfit/configs"
	"driftfit/ingest"
)

const benchHelp = `Usage: driftfit bench [flags]

Measures the service as serve builds it (decode, validate, windows, bbolt
commits with fsync) against a subscriber that only counts or acks the same
messages, on an embedded NATS server on 127.0.0.1 unless --servers is given.
No thresholds: it prints what it measured. It fails only when a phase
applied nothing or produced a number that is not finite.`

func runBench(ctx context.Context, args []string, _ io.Reader, stdout, stderr io.Writer) error {
	fs := newFlags("bench", benchHelp)
	o := bench.Options{}
	fs.DurationVar(&o.Duration, "duration", 10*time.Second, "time for the throughput and latency phases, shared among them")
	fs.IntVar(&o.Sensors, "sensors", 10000, "sensors the publisher feeds in the throughput and latency phases")
	fs.IntVar(&o.SensorsMax, "sensors-max", 100000, "largest fleet of the memory and restart phase (also run at 10,000 when larger; 0 skips the phase)")
	fs.StringVar(&o.Servers, "servers", "", "comma-separated NATS URLs to use instead of an embedded server")
	asJSON := fs.Bool("json", false, "print the results as one JSON object")
	cpuProfile := fs.String("cpuprofile", "", "write a CPU profile of the whole run to `FILE` (go tool pprof reads it)")
	pos, err := fs.parse(args)
	switch {
	case err != nil:
		return err
	case len(pos) != 0:
		return usageError("unexpected arguments %q", pos)
	case o.Duration < time.Second:
		return usageError("--duration %v: want at least 1s", o.Duration)
	case o.Sensors < 1:
		return usageError("--sensors %d: want at least 1", o.Sensors)
	case o.SensorsMax < 0:
		return usageError("--sensors-max %d: want 0 or more", o.SensorsMax)
	}
	log := zerolog.New(stderr).Level(zerolog.WarnLevel).With().Timestamp().Logger()
	o.Serve = benchWiring(log)
	if *cpuProfile != "" {
		f, err := os.Create(*cpuProfile)
		if err != nil {
			return err
		}
		defer f.Close()
		if err := pprof.StartCPUProfile(f); err != nil {
			return err
		}
		defer pprof.StopCPUProfile()
	}
	rep, err := bench.Run(ctx, o, log, stderr)
	if err != nil {
		return err
	}
	if *asJSON {
		enc := json.NewEncoder(stdout)
		enc.SetIndent("", "  ")
		if err := enc.Encode(rep); err != nil {
			return err
		}
	} else {
		rep.Print(stdout)
	}
	return rep.Check()
}

// benchWiring hands the bench serve's own parts: its bus connection (on
// any free port) and its mapping of the configuration onto ingest, alert
// rules included.
func benchWiring(log zerolog.Logger) bench.Wiring {
	return bench.Wiring{
		Connect: func(cfg *configs.Config) (*bench.Bus, error) {
			ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
			defer cancel()
			b, err := ingest.Connect(ctx, busOptions(cfg, -1, &log, nil))
			if err != nil {
				return nil, err
			}
			return &bench.Bus{Conn: b.Conn(), Server: b.Server(), Close: func() { _ = b.Close() }}, nil
		},
		IngestOptions: serviceOptions,
	}
}
