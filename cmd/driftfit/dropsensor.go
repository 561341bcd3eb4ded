package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"time"

	"driftfit/store"
)

const dropSensorHelp = `Usage: driftfit drop-sensor [--data DIR] SENSOR

Deletes the stored state of one sensor from the state file: its window
panes and specs, the time its fits last restarted, the stream sequence
its state held, its alert state, and whatever of it was set aside as
damaged. Its fit history, alert events, tickets and calibration records
are kept (a calibration from before the drop can no longer be voided or
corrected). If the sensor reports again, its windows start empty.

Stop driftfit serve first: the command refuses while a service holds the
file, which would otherwise write the sensor back at its next commit.`

// dropSensorLockWait bounds the wait for the file's lock: long enough to
// ride out a service that is just exiting, short enough to tell at once
// that one is running.
const dropSensorLockWait = time.Second

func runDropSensor(_ context.Context, args []string, _ io.Reader, stdout, _ io.Writer) error {
	fs := newFlags("drop-sensor", dropSensorHelp)
	dataDir := fs.String("data", "", "the service's data `DIR` (as for driftfit serve --data); default: the directory of "+defaultDBPath())
	pos, err := fs.parse(args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		return usageError("want one SENSOR id, got %d arguments", len(pos))
	}
	id := pos[0]
	path := defaultDBPath()
	if *dataDir != "" {
		path = filepath.Join(*dataDir, dbFile)
	}
	// Open would create a missing file: a mistyped directory must not
	// leave an empty state file behind.
	if _, err := os.Stat(path); err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return fmt.Errorf("no state file at %s (give --data DIR)", path)
		}
		return err
	}
	db, err := store.Open(path, store.Options{LockTimeout: dropSensorLockWait})
	if errors.Is(err, store.ErrLocked) {
		return fmt.Errorf("%s is held by a running driftfit serve (or another process using it): "+
			"stop the service, then run drop-sensor again: %w", path, err)
	}
	if err != nil {
		return err
	}
	d, err := db.DropSensor(id)
	if cerr := db.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		return err
	}
	if !d.Any() {
		return fmt.Errorf("sensor %q has no stored state in %s; nothing deleted", id, path)
	}
	var what []string
	if d.Specs {
		what = append(what, "window specs")
	}
	if d.Panes > 0 {
		what = append(what, fmt.Sprintf("%d panes", d.Panes))
	}
	if d.Restart {
		what = append(what, "restart time")
	}
	if d.Seq {
		what = append(what, "stream sequence")
	}
	if d.Alert {
		what = append(what, "alert state")
	}
	if d.SetAside > 0 {
		what = append(what, fmt.Sprintf("%d values set aside as damaged", d.SetAside))
	}
	fmt.Fprintf(stdout, "dropped sensor %s from %s: %s; its fit history is kept\n", id, path, strings.Join(what, ", "))
	return nil
}
