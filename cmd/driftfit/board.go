package main

import (
	"context"
	"math"
	"slices"
	"sync"
	"time"

	"github.com/rs/zerolog"

	"driftfit/configs"
	"driftfit/rolling"
)

// driftBoard keeps the latest line fit of each sensor's longest window, as
// panes close, and logs the sensors whose drift stands out most. It gives a
// newcomer running the demo something to watch; alert rules are the real
// decision.
type driftBoard struct {
	mu     sync.Mutex
	latest map[string]boardEntry
}

type boardEntry struct {
	window rolling.WindowSpec
	fit    rolling.Fit
}

func newDriftBoard() *driftBoard { return &driftBoard{latest: map[string]boardEntry{}} }

// paneClosed is an ingest.Options.OnPaneClose hook; it runs on the
// sensors' workers.
func (b *driftBoard) paneClosed(id string, _ int, sol *rolling.Solution) {
	b.mu.Lock()
	defer b.mu.Unlock()
	if e, ok := b.latest[id]; ok && e.window.Span > sol.Window.Span {
		return
	}
	b.latest[id] = boardEntry{window: sol.Window, fit: sol.Line}
}

// run logs the top drifting sensors every interval until ctx is done.
func (b *driftBoard) run(ctx context.Context, interval time.Duration, top int, log zerolog.Logger) {
	tick := time.NewTicker(interval)
	defer tick.Stop()
	type ranked struct {
		id    string
		e     boardEntry
		score float64 // |drift| in standard errors
	}
	for {
		select {
		case <-ctx.Done():
			return
		case <-tick.C:
		}
		var rs []ranked
		b.mu.Lock()
		for id, e := range b.latest {
			if e.fit.Err == nil && e.fit.SE[1] > 0 {
				rs = append(rs, ranked{id, e, math.Abs(e.fit.Coef[1]) / e.fit.SE[1]})
			}
		}
		b.mu.Unlock()
		slices.SortFunc(rs, func(a, b ranked) int {
			if a.score != b.score {
				if a.score > b.score {
					return -1
				}
				return 1
			}
			if a.id < b.id {
				return -1
			}
			return 1
		})
		for i, r := range rs[:min(top, len(rs))] {
			f := &r.e.fit
			log.Info().Int("rank", i+1).Str("sensor", r.id).
				Str("window", configs.FormatDuration(r.e.window.Span)+"/"+configs.FormatDuration(r.e.window.Pane)).
				Float64("slope", f.Coef[1]).Float64("ci_low", f.CI[1][0]).Float64("ci_high", f.CI[1][1]).
				Float64("value_now", f.Coef[0]).Int("n", f.N).Float64("se_ratio", r.score).
				Msg("drift standing out (per day)")
		}
	}
}
