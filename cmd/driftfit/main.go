// Command driftfit watches sensor readings for slow drift and degradation:
// it keeps sliding least-squares fits per sensor and reports them.
//
// Usage:
//
//	driftfit <command> [flags] [args]
//
// Run "driftfit help" for the list of commands.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
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
		{"replay", "fit readings from a CSV file and print the final fits", runReplay},
		{"serve", "run the service: read readings from NATS, keep and store the fits", runServe},
		{"demo-feed", "generate readings of an invented plant", runDemoFeed},
		{"history", "print or plot the fit history of a sensor from the database", runHistory},
		{"check-config", "check a configuration file and explain what it sets", runCheckConfig},
		{"alerts", "list alert events, or the alerts still firing", runAlerts},
		{"tickets", "list recalibration tickets", runTickets},
		{"calibrated", "record a sensor's calibration (as-found, as-left) with the running service", runCalibrated},
		{"bench", "measure throughput, latency, memory and restart against the bare bus", runBench},
	}
}

// errUsage marks an error whose message is a usage complaint; the exit
// status is then 2.
var errUsage = errors.New("usage")

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	code := run(ctx, os.Args[1:], os.Stdin, os.Stdout, os.Stderr)
	stop()
	os.Exit(code)
}

func run(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	if len(args) == 0 || args[0] == "help" || args[0] == "-h" || args[0] == "--help" {
		usage(stderr)
		if len(args) == 0 {
			return 2
		}
		return 0
	}
	for _, c := range commands {
		if c.name != args[0] {
			continue
		}
		err := c.run(ctx, args[1:], stdin, stdout, stderr)
		switch {
		case err == nil:
			return 0
		case errors.Is(err, flag.ErrHelp):
			return 0
		case errors.Is(err, errUsage):
			fmt.Fprintf(stderr, "driftfit %s: %v\n", c.name, err)
			return 2
		default:
			fmt.Fprintf(stderr, "driftfit %s: %v\n", c.name, err)
			return 1
		}
	}
	fmt.Fprintf(stderr, "driftfit: unknown command %q\n\n", args[0])
	usage(stderr)
	return 2
}

func usage(w io.Writer) {
	fmt.Fprintln(w, "driftfit: sliding least-squares drift fits for sensor fleets")
	fmt.Fprintln(w, "\nUsage: driftfit <command> [flags] [args]\n\nCommands:")
	for _, c := range commands {
		fmt.Fprintf(w, "  %-14s %s\n", c.name, c.summary)
	}
	fmt.Fprintln(w, "\nRun \"driftfit <command> -h\" for the flags of a command.")
}

// parseInterleaved parses fs from args where positional arguments may
// stand before, between or after the flags, and returns the positional
// ones in order.
func parseInterleaved(fs *flag.FlagSet, args []string) ([]string, error) {
	var pos []string
	for {
		if err := fs.Parse(args); err != nil {
			return nil, err
		}
		if fs.NArg() == 0 {
			return pos, nil
		}
		pos = append(pos, fs.Arg(0))
		args = fs.Args()[1:]
	}
}

// usageError wraps a message as a usage error.
func usageError(format string, a ...any) error {
	return fmt.Errorf("%w: %s", errUsage, fmt.Sprintf(format, a...))
}
