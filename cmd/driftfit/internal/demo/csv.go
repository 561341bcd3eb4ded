package demo

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"strconv"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"
)

// CSVOptions configure WriteCSV.
type CSVOptions struct {
	Sensors int           // fleet size (0: the plant's 360)
	Span    time.Duration // plant time covered
	Every   time.Duration // plant time between two readings of one sensor
	Start   time.Time     // plant time of the first reading
	Seed    uint64        // seed of the reading noise
}

// WriteCSV writes the plant's readings as a replay file (header
// sensor,time,value; Unix seconds; 8 significant digits), every sensor
// at each step of o.Every from o.Start over o.Span.
func WriteCSV(ctx context.Context, out io.Writer, o CSVOptions) error {
	plant := Fleet(o.Sensors)
	w := bufio.NewWriterSize(out, 64<<10)
	rng := rand.New(rand.NewPCG(o.Seed, 0))
	fmt.Fprintln(w, "sensor,time,value")
	var line []byte
	for t := time.Duration(0); t < o.Span; t += o.Every {
		if ctx.Err() != nil {
			return ctx.Err()
		}
		d := t.Hours() / 24
		at := o.Start.Add(t).Unix()
		for i := range plant {
			s := &plant[i]
			line = append(line[:0], s.ID...)
			line = append(line, ',')
			line = strconv.AppendInt(line, at, 10)
			line = append(line, ',')
			line = strconv.AppendFloat(line, s.Value(d, rng), 'g', 8, 64)
			line = append(line, '\n')
			if _, err := w.Write(line); err != nil {
				return err
			}
		}
	}
	return w.Flush()
}

// PublishTo connects to the NATS server at url and runs Publish on that
// connection; a cancelled ctx ends it without error once what was
// published is flushed.
func PublishTo(ctx context.Context, url string, o Options, log zerolog.Logger) error {
	nc, err := nats.Connect(url, nats.Name("driftfit demo-feed"))
	if err != nil {
		return fmt.Errorf("connect to %s: %w", url, err)
	}
	defer nc.Close()
	err = Publish(ctx, nc, o, log)
	if err != nil && !errors.Is(err, context.Canceled) {
		return err
	}
	return nc.Flush()
}
