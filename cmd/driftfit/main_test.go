package main

import (
	"context"
	"os"
	"os/signal"
	"strings"
	"syscall"
	"testing"
)

// childEnv, when set, makes the test binary run driftfit itself with the
// arguments in the variable (separated by newlines): tests start real
// driftfit processes this way, to kill and restart them.
const childEnv = "DRIFTFIT_TEST_CHILD_ARGS"

func TestMain(m *testing.M) {
	if args := os.Getenv(childEnv); args != "" {
		ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
		code := run(ctx, strings.Split(args, "\n"), os.Stdin, os.Stdout, os.Stderr)
		stop()
		os.Exit(code)
	}
	os.Exit(m.Run())
}
