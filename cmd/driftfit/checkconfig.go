package main

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"strings"

	"driftfit/configs"
)

const checkConfigHelp = `Usage: driftfit check-config FILE [--sensor ID[,ID...]]...

Reads a configuration file the way "driftfit serve --config FILE" does and
reports every problem at once, one per line on standard error, as

  FILE:LINE:COLUMN: FIELD = "VALUE": what is wrong: detail

(LINE:COLUMN is left out when the problem has no single place, such as a
sensor that matches no class). Unknown keys, wrong types, durations and
quantities that do not parse, units that differ from the class unit,
impossible limits and classes whose patterns overlap are all reported.

When the file is good, a summary goes to standard output: the bus, store,
ticket webhook (secrets masked), every class with its tolerance and limits
converted to canonical units (class unit, per day, per day²), sensors with
their own settings, and peer groups.

With --sensor, only the named sensors are shown instead: the class each
resolves to and why, its overrides, as-left value, peer group, and merged
settings. A sensor that matches no class is a problem.

Exit status: 0 when the file (and every --sensor) is good, 1 when there are
problems, 2 for a usage error.`

// sensorList collects --sensor values, repeated or comma-separated.
type sensorList []string

func (s *sensorList) String() string { return strings.Join(*s, ",") }

func (s *sensorList) Set(v string) error {
	for _, id := range strings.Split(v, ",") {
		id = strings.TrimSpace(id)
		if id == "" {
			return errors.New("empty sensor id")
		}
		*s = append(*s, id)
	}
	return nil
}

func runCheckConfig(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) error {
	fs := newFlags("check-config", checkConfigHelp)
	var sensors sensorList
	fs.Var(&sensors, "sensor", "show how sensor `ID` resolves (repeatable, or comma-separated ids)")
	// Flags may come before or after the file name.
	pos, err := fs.parse(args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		return usageError("want one configuration FILE, got %d arguments", len(pos))
	}
	file := pos[0]

	cfg, err := configs.Load(file)
	if err != nil {
		var fe *configs.FieldError
		if !errors.As(err, &fe) {
			return err // unreadable file: one message from run
		}
		problems := unjoin(err)
		for _, p := range problems {
			fmt.Fprintln(stderr, p)
		}
		return fmt.Errorf("%s: %s", file, countProblems(len(problems)))
	}
	if len(sensors) == 0 {
		cfg.Explain(stdout)
		return nil
	}
	bad, shown := 0, 0
	var buf bytes.Buffer
	for _, id := range sensors {
		buf.Reset()
		if err := cfg.ExplainSensor(&buf, id); err != nil {
			fmt.Fprintf(stderr, "--sensor %s: %v\n", id, err)
			bad++
			continue
		}
		if shown > 0 {
			fmt.Fprintln(stdout)
		}
		shown++
		stdout.Write(buf.Bytes())
	}
	if bad > 0 {
		return fmt.Errorf("%s: %s with --sensor", file, countProblems(bad))
	}
	return nil
}

// unjoin splits an errors.Join result into its parts.
func unjoin(err error) []error {
	if j, ok := err.(interface{ Unwrap() []error }); ok {
		return j.Unwrap()
	}
	return []error{err}
}

func countProblems(n int) string {
	if n == 1 {
		return "1 problem"
	}
	return fmt.Sprintf("%d problems", n)
}
