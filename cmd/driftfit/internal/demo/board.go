package demo

import (
	"context"
	"fmt"
	"math"
	"slices"
	"sync"
	"time"

	"github.com/rs/zerolog"

	"driftfit/cmd/driftfit/internal/report"
	"driftfit/rolling"
)

// Board keeps the latest line fit of each sensor's longest window, as
// panes close, and logs the sensors whose drift stands out most. It gives a
// newcomer running the demo something to watch; alert rules are the real
// decision.
type Board struct {
	unit   func(id string) string
	mu     sync.Mutex
	latest map[string]boardEntry
}

type boardEntry struct {
	window rolling.WindowSpec
	fit    rolling.Fit
}

// NewBoard returns an empty board; unit gives a sensor's engineering unit
// for the log ("" unknown; nil: none known).
func NewBoard(unit func(id string) string) *Board {
	if unit == nil {
		unit = func(string) string { return "" }
	}
	return &Board{unit: unit, latest: map[string]boardEntry{}}
}

// PaneClosed is an ingest.Options.OnPaneClose hook; it runs on the
// sensors' workers and is safe for concurrent use.
func (b *Board) PaneClosed(id string, _ int, sol *rolling.Solution) {
	b.mu.Lock()
	defer b.mu.Unlock()
	if e, ok := b.latest[id]; ok && e.window.Span > sol.Window.Span {
		return
	}
	b.latest[id] = boardEntry{window: sol.Window, fit: sol.Line}
}

// Run logs the top drifting sensors every interval until ctx is done;
// a rank whose line would read as the last one logged for it is not
// logged again.
func (b *Board) Run(ctx context.Context, interval time.Duration, top int, log zerolog.Logger) {
	tick := time.NewTicker(interval)
	defer tick.Stop()
	shown := make([]string, top) // per rank, what was logged last
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
			// Rounded to the digits the 95% interval leaves meaningful.
			u := f.TCrit * f.SE[1]
			unit := b.unit(r.id)
			slope, ci := report.RoundTo(f.Coef[1], u), report.RoundTo(u, u)
			now := report.RoundTo(f.Coef[0], f.TCrit*f.SE[0])
			line := fmt.Sprint(r.id, r.e.window, slope, ci, now)
			if shown[i] == line {
				continue
			}
			shown[i] = line
			log.Info().Int("rank", i+1).Str("sensor", r.id).
				Str("window", report.WindowLabel(r.e.window)).
				Float64("slope", slope).Float64("slope_ci95", ci).
				Str("slope_unit", unit+"/d").
				Float64("value_now", now).Str("unit", unit).
				Int("n", f.N).Float64("se_ratio", report.RoundTo(r.score, 0.1)).
				Msg("drift standing out")
		}
	}
}
