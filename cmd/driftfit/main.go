// Command driftfit watches sensor readings for slow drift and degradation:
// it keeps sliding least-squares fits per sensor and reports them.
//
// Usage:
//
//	driftfit <command> [flags] [args]
//
// Run "driftfit help" for the list of commands, "driftfit help CMD" for
// one command. Exit status: 0 on success (and for help), 1 when the
// command failed, 2 for a usage error.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"runtime/debug"
	"strings"
	"syscall"
	"time"
	_ "time/tzdata" // IANA zones for replay --time-zone on machines without zoneinfo

	"github.com/mattn/go-isatty"
	"github.com/rs/zerolog"

	"driftfit/cmd/driftfit/internal/query"
	"driftfit/cmd/driftfit/internal/replay"
)

// command is one subcommand of the binary.
type command struct {
	name    string
	summary string
	run     func(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) error
}

var commands []command

func init() {
	commands = []command{
		{"replay", "fit readings from a CSV file: the final fits, or with --config the alerts and tickets serve would have raised", runReplay},
		{"serve", "run the service: read readings from NATS, keep and store the fits", runServe},
		{"demo-feed", "generate readings of an invented plant", runDemoFeed},
		{"history", "print or plot the fit history of a sensor from the database", runHistory},
		{"check-config", "check a configuration file and explain what it sets", runCheckConfig},
		{"alerts", "list alert events, or the alerts still firing", runAlerts},
		{"tickets", "list recalibration tickets", runTickets},
		{"calibrated", "record a sensor's calibration (as-found, as-left) with the running service; void or correct one", runCalibrated},
		{"calibrations", "list the recorded calibrations, voided and corrected ones marked", runCalibrations},
		{"bench", "measure throughput, latency, memory and restart against the bare bus", runBench},
		{"drop-sensor", "delete one sensor's stored state (not its history) while serve is stopped", runDropSensor},
	}
}

// Exit statuses.
const (
	exitOK      = 0
	exitFailure = 1
	exitUsage   = 2
)

// errUsage marks a usage complaint: the exit status is then 2.
var errUsage = errors.New("usage")

// usageErr is a usage complaint naming the one problem.
type usageErr struct{ msg string }

func (e *usageErr) Error() string        { return e.msg }
func (e *usageErr) Is(target error) bool { return target == errUsage }

// usageError returns a usage error with a formatted message.
func usageError(format string, a ...any) error {
	return &usageErr{fmt.Sprintf(format, a...)}
}

// helpRequest is returned by a command asked for its help (-h): run
// prints it on standard output and exits 0.
type helpRequest struct{ fs *flags }

func (h *helpRequest) Error() string        { return "help requested" }
func (h *helpRequest) Is(target error) bool { return target == flag.ErrHelp }

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	code := run(ctx, os.Args[1:], os.Stdin, os.Stdout, os.Stderr)
	stop()
	os.Exit(code)
}

func run(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	if len(args) == 0 {
		usage(stderr)
		return exitUsage
	}
	switch args[0] {
	case "-h", "-help", "--help":
		usage(stdout)
		return exitOK
	case "-version", "--version":
		fmt.Fprintln(stdout, version())
		return exitOK
	case "help":
		if len(args) == 1 {
			usage(stdout)
			return exitOK
		}
		if find(args[1]) == nil {
			fmt.Fprintf(stderr, "driftfit help: unknown command %q; see driftfit help\n", args[1])
			return exitUsage
		}
		return run(ctx, []string{args[1], "-h"}, stdin, stdout, stderr)
	}
	c := find(args[0])
	if c == nil {
		fmt.Fprintf(stderr, "driftfit: unknown command %q; see driftfit help\n", args[0])
		return exitUsage
	}
	err := c.run(ctx, args[1:], stdin, stdout, stderr)
	var help *helpRequest
	switch {
	case err == nil:
		return exitOK
	case errors.As(err, &help):
		help.fs.printHelp(stdout)
		return exitOK
	case isUsage(err):
		fmt.Fprintf(stderr, "driftfit %s: %v; see driftfit %s -h\n", c.name, err, c.name)
		return exitUsage
	default:
		fmt.Fprintf(stderr, "driftfit %s: %v\n", c.name, err)
		return exitFailure
	}
}

func isUsage(err error) bool {
	var qe *query.UsageError
	var we *replay.WindowError
	return errors.Is(err, errUsage) || errors.As(err, &qe) || errors.As(err, &we)
}

func find(name string) *command {
	for i := range commands {
		if commands[i].name == name {
			return &commands[i]
		}
	}
	return nil
}

func usage(w io.Writer) {
	fmt.Fprintln(w, "driftfit: sliding least-squares drift fits for sensor fleets")
	fmt.Fprintln(w, "\nUsage: driftfit <command> [flags] [args]\n\nCommands:")
	for _, c := range commands {
		fmt.Fprintf(w, "  %-14s %s\n", c.name, c.summary)
	}
	fmt.Fprintln(w, "\nRun \"driftfit help <command>\" (or \"driftfit <command> -h\") for a command's flags,\n\"driftfit --version\" for the version.")
}

// version describes the build: module version, VCS revision and time
// when the binary was built from a repository, and the Go version.
func version() string {
	info, ok := debug.ReadBuildInfo()
	if !ok {
		return "driftfit (no build information)"
	}
	s := "driftfit " + info.Main.Version
	var rev, at, dirty string
	for _, kv := range info.Settings {
		switch kv.Key {
		case "vcs.revision":
			rev = kv.Value
		case "vcs.time":
			at = kv.Value
		case "vcs.modified":
			if kv.Value == "true" {
				dirty = " with local changes"
			}
		}
	}
	if rev != "" {
		s += " revision " + rev
		if at != "" {
			s += " of " + at
		}
		s += dirty
	}
	return s + " built with " + info.GoVersion
}

// flags is a command's flag set. It prints nothing itself: -h comes back
// as a *helpRequest, a bad flag as a usage error naming it.
type flags struct {
	*flag.FlagSet
	help string
}

func newFlags(name, help string) *flags {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	fs.Usage = func() {}
	return &flags{FlagSet: fs, help: help}
}

func (f *flags) printHelp(w io.Writer) {
	fmt.Fprintln(w, strings.TrimRight(f.help, "\n")+"\n\nFlags:")
	f.SetOutput(w)
	f.PrintDefaults()
	f.SetOutput(io.Discard)
}

// parse parses args where positional arguments may stand before,
// between or after the flags, and returns the positional ones in order.
func (f *flags) parse(args []string) ([]string, error) {
	var pos []string
	for {
		if err := f.Parse(args); err != nil {
			if errors.Is(err, flag.ErrHelp) {
				return nil, &helpRequest{f}
			}
			return nil, usageError("%v", err)
		}
		if f.NArg() == 0 {
			return pos, nil
		}
		pos = append(pos, f.Arg(0))
		args = f.Args()[1:]
	}
}

// newLogger returns the root logger writing to w: JSON, or a console
// format for people, coloured only when w is a terminal.
func newLogger(w io.Writer, format, level string) (zerolog.Logger, error) {
	lvl, err := zerolog.ParseLevel(level)
	if err != nil {
		return zerolog.Logger{}, fmt.Errorf("--log-level %q: %w", level, err)
	}
	switch format {
	case "json":
	case "console":
		w = zerolog.ConsoleWriter{Out: w, TimeFormat: time.RFC3339, NoColor: !isTerminal(w)}
	default:
		return zerolog.Logger{}, fmt.Errorf("--log-format %q: want json or console", format)
	}
	return zerolog.New(w).Level(lvl).With().Timestamp().Logger(), nil
}

// isTerminal reports whether w is a terminal, where colour codes belong.
func isTerminal(w io.Writer) bool {
	f, ok := w.(interface{ Fd() uintptr })
	return ok && (isatty.IsTerminal(f.Fd()) || isatty.IsCygwinTerminal(f.Fd()))
}

const serveHelp = `Usage: driftfit serve [flags]

Runs the service: reads readings from NATS, keeps the sliding fits of every
sensor, stores their state and fit history. With no bus.servers configured it
starts an embedded NATS server with JetStream on 127.0.0.1.`
