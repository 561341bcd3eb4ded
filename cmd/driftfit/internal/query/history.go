package query

import (
	"context"
	"errors"
	"fmt"
	"io"
	"slices"
	"strings"
	"time"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/report"
	"driftfit/rolling"
	"driftfit/store"
)

// HistoryQuery selects fit-history records of one sensor.
type HistoryQuery struct {
	Sensor       string
	Span         time.Duration      // 0: every window
	Spec         rolling.WindowSpec // zero unless a pane was given too
	Since, Until time.Time          // zero: open end
	Models       []rolling.Model
	// Recent, when Since and Until are both zero, keeps only the records
	// within Recent of the sensor's newest one (so an old file still
	// shows its last weeks); 0 keeps everything.
	Recent time.Duration
}

// History writes the records q selects from src to every writer of outs,
// each record once per model of q, and returns how many records matched.
// When nothing matches it writes a note to note naming the windows and
// times the sensor has, or returns an error when the sensor has no
// history at all, offering ids that look alike. A note also says when
// Recent left older records out. The caller closes the writers.
func History(ctx context.Context, src Source, q HistoryQuery, outs []report.Writer, note io.Writer) (int, error) {
	var recent []store.HistoryRecord // records within q.Recent of the newest, when it applies
	useRecent := q.Recent > 0 && q.Since.IsZero() && q.Until.IsZero()
	older := 0
	var oldest time.Time
	matched := 0
	emit := func(r *store.HistoryRecord) error {
		sol := &r.Solution
		label := report.WindowLabel(sol.Window)
		for _, out := range outs {
			for _, m := range q.Models {
				if err := out.Fit(q.Sensor, label, sol, m); err != nil {
					return err
				}
			}
		}
		return nil
	}
	err := src.History(q.Sensor, q.Spec, q.Since, q.Until, func(r store.HistoryRecord) error {
		if q.Span != 0 && r.Solution.Window.Span != q.Span {
			return nil
		}
		if matched&0x3ff == 0 && ctx.Err() != nil {
			return ctx.Err()
		}
		matched++
		if !useRecent {
			return emit(&r)
		}
		// Records come in time order: keep those within Recent of this
		// one, the newest so far.
		if oldest.IsZero() {
			oldest = r.Solution.Last
		}
		cut := r.Solution.Last.Add(-q.Recent)
		i := 0
		for i < len(recent) && recent[i].Solution.Last.Before(cut) {
			i++
		}
		older += i
		recent = append(recent[i:], r)
		return nil
	})
	if err != nil {
		return matched, err
	}
	for i := range recent {
		if err := emit(&recent[i]); err != nil {
			return matched, err
		}
	}
	if older > 0 {
		fmt.Fprintf(note, "driftfit history: showing the %s up to the newest record (%s); %d older records from %s on are left out: --since or --until select them\n",
			report.Duration(q.Recent), recent[len(recent)-1].Solution.Last.UTC().Format(time.RFC3339), older, oldest.UTC().Format(time.DateOnly))
		matched -= older
	}
	if matched == 0 {
		return 0, explainNoRecords(src, q, note)
	}
	return matched, nil
}

// explainNoRecords says on w why nothing matched: an error when the
// sensor has no history at all, a note naming what there is otherwise.
func explainNoRecords(src Source, q HistoryQuery, w io.Writer) error {
	var windows []rolling.WindowSpec
	var first, last time.Time
	err := src.History(q.Sensor, rolling.WindowSpec{}, time.Time{}, time.Time{}, func(r store.HistoryRecord) error {
		if !slices.Contains(windows, r.Solution.Window) {
			windows = append(windows, r.Solution.Window)
		}
		if first.IsZero() {
			first = r.Solution.Last
		}
		last = r.Solution.Last
		return nil
	})
	if err != nil {
		return err
	}
	if len(windows) == 0 {
		return noSensorError(src, q.Sensor)
	}
	slices.SortFunc(windows, func(a, b rolling.WindowSpec) int {
		if a.Span != b.Span {
			return int(a.Span - b.Span)
		}
		return int(a.Pane - b.Pane)
	})
	labels := make([]string, len(windows))
	for i, ws := range windows {
		labels[i] = report.WindowLabel(ws)
	}
	fmt.Fprintf(w, "driftfit history: no records of %s match; it has records of windows %s from %s to %s\n",
		report.EscapeID(q.Sensor), strings.Join(labels, ", "), first.UTC().Format(time.RFC3339), last.UTC().Format(time.RFC3339))
	return nil
}

// maxSuggestions bounds the sensor ids offered when the one asked for
// has no history.
const maxSuggestions = 5

// ErrNoHistory is returned, wrapped with the sensor and suggestions,
// when a sensor has no fit history at all.
var ErrNoHistory = errors.New("no fit history")

// noSensorError reports a sensor without history, offering the ids
// that share the longest prefix with it (a typo usually sits late in an
// id such as plant.unit.tag).
func noSensorError(src Source, sensor string) error {
	type cand struct {
		id     string
		common int
	}
	var cands []cand
	err := src.HistorySensors(func(id string) error {
		n := 0
		for n < len(id) && n < len(sensor) && id[n] == sensor[n] {
			n++
		}
		cands = append(cands, cand{id, n})
		return nil
	})
	if err != nil {
		return err
	}
	msg := fmt.Errorf("sensor %q has %w in %s", sensor, ErrNoHistory, src.Path())
	if len(cands) == 0 {
		return fmt.Errorf("%w (the file holds no fit history at all)", msg)
	}
	slices.SortStableFunc(cands, func(a, b cand) int { return b.common - a.common })
	var ids []string
	for _, c := range cands[:min(maxSuggestions, len(cands))] {
		ids = append(ids, report.EscapeID(c.id))
	}
	return fmt.Errorf("%w; %d sensors have history, such as %s", msg, len(cands), strings.Join(ids, ", "))
}

// StoredUnit returns the unit of sensor's readings as its newest
// ticket records it, else as its newest alert event of a kind whose
// unit names it (slope: "kPa/d" is kPa), or "" when neither does: fit
// records carry no unit.
func StoredUnit(src Source, sensor string) (string, error) {
	unit := ""
	var newest time.Time
	err := src.Tickets(func(_ string, data []byte) error {
		tk, err := decodeTicket(data)
		if err != nil {
			return err
		}
		if tk.Sensor == sensor && tk.Unit != "" && !tk.Opened.Before(newest) {
			unit, newest = tk.Unit, tk.Opened
		}
		return nil
	})
	if err != nil || unit != "" {
		return unit, err
	}
	err = src.Events(time.Time{}, time.Time{}, func(_ time.Time, data []byte) error {
		ev, err := decodeEvent(data)
		if err != nil {
			return err
		}
		if ev.Sensor != sensor {
			return nil
		}
		if u := EventUnit(ev.Kind, ev.Unit); u != "" {
			unit = u // events come in time order: the newest wins
		}
		return nil
	})
	return unit, err
}

// EventUnit returns the sensor's unit that an event's unit u implies
// for kind k, or "" when that kind's unit does not name it (lead time
// is in days, doubling in 1/d). It inverts alert.ReportUnit.
func EventUnit(k alert.Kind, u string) string {
	suffix := ""
	switch k {
	case alert.Slope:
		suffix = "/d"
	case alert.Curvature:
		suffix = "/d²"
	case alert.Step, alert.OutOfSpan:
	default:
		return ""
	}
	if base, ok := strings.CutSuffix(u, suffix); ok {
		return base
	}
	return ""
}
