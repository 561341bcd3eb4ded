package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"

	"driftfit/cmd/driftfit/internal/replay"
	"driftfit/configs"
	"driftfit/ingest"
	"driftfit/store"
)

// flowFlags are replay's flags of a run through the service.
type flowFlags struct {
	config, calibrations, events, tickets, logLevel string
}

// runReplayFlow replays in through the service as serve builds it from
// the configuration (serviceOptions), and writes the alert events and
// ticket revisions it stored.
func runReplayFlow(ctx context.Context, in io.Reader, fl flowFlags, csvOpts ingest.CSVOptions, strict bool, stdout, stderr io.Writer) (err error) {
	cfg, err := configs.Load(fl.config)
	if err != nil {
		return err
	}
	log, err := newLogger(stderr, "console", fl.logLevel)
	if err != nil {
		return usageError("%v", err)
	}
	var cals []replay.Calibration
	if fl.calibrations != "" {
		if cals, err = readCalibrations(fl.calibrations, strict, stderr); err != nil {
			return err
		}
	}
	// The outputs are made before the run, so a bad path fails at once
	// rather than after an hour of readings; a failed run removes them.
	outs := map[string]*os.File{}
	open := func(path string) (io.Writer, error) {
		if path == "" || path == "-" {
			return stdout, nil
		}
		if f := outs[path]; f != nil {
			return f, nil
		}
		f, err := os.Create(path)
		if err != nil {
			return nil, err
		}
		outs[path] = f
		return f, nil
	}
	defer func() {
		for path, f := range outs {
			err = errors.Join(err, f.Close())
			if err != nil {
				os.Remove(path)
			}
		}
	}()
	evOut, err := open(fl.events)
	if err != nil {
		return err
	}
	tkOut, err := open(fl.tickets)
	if err != nil {
		return err
	}

	res, err := replay.RunFlow(ctx, in, replay.FlowOptions{
		CSV:          csvOpts,
		Strict:       strict,
		Calibrations: cals,
		Errors:       stderr,
		Service: func(db *store.DB) ingest.Options {
			return serviceOptions(cfg, db, &log, nil)
		},
	})
	if err != nil {
		return err
	}
	if evOut == tkOut {
		err = res.WriteAll(evOut)
	} else {
		err = errors.Join(res.WriteEvents(evOut), res.WriteTickets(tkOut))
	}
	if err != nil {
		return err
	}
	return res.Summary(stderr)
}

// readCalibrations reads the calibrations file at path, reporting its
// bad rows on stderr (the first maxShown of them); with strict the first
// bad row is the error.
func readCalibrations(path string, strict bool, stderr io.Writer) ([]replay.Calibration, error) {
	const maxShown = 20
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	cals, bad, err := replay.ReadCalibrations(f)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	if strict && len(bad) > 0 {
		return nil, fmt.Errorf("%s: %w", path, bad[0])
	}
	for i, e := range bad {
		if i == maxShown {
			fmt.Fprintf(stderr, "driftfit replay: %s: %d more bad calibration rows not shown\n", path, len(bad)-maxShown)
			break
		}
		fmt.Fprintf(stderr, "driftfit replay: %s: %v\n", path, e)
	}
	return cals, nil
}
