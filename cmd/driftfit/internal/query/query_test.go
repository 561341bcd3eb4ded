package query_test

import (
	"bytes"
	"context"
	"errors"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"driftfit/cmd/driftfit/internal/query"
	"driftfit/cmd/driftfit/internal/report"
	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// hourlyFile writes a state file with the fit records of one sensor with
// a 1d/1h window and a reading every hour for 40 days: every reading
// after the first closes a pane, so record k (k = 1 … 959) is the fit up
// to reading k−1, at t0 + (k−1) h.
func hourlyFile(t *testing.T) (path string, t0 time.Time) {
	t.Helper()
	return hourlyFileWith(t, nil)
}

// hourlyFileWith is hourlyFile with each solution changed by edit (nil:
// none) before it is recorded.
func hourlyFileWith(t *testing.T, edit func(*rolling.Solution)) (path string, t0 time.Time) {
	t.Helper()
	path = filepath.Join(t.TempDir(), "driftfit.db")
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	s, err := rolling.NewSensor(rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour})
	if err != nil {
		t.Fatal(err)
	}
	t0 = time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	var b store.Batch
	for k := range 40 * 24 {
		at := t0.Add(time.Duration(k) * time.Hour)
		if s.Closes(at.UnixNano()) != 0 {
			sol := s.Solve(0)
			if edit != nil {
				edit(&sol)
			}
			if err := b.Record("qm.a", &sol); err != nil {
				t.Fatal(err)
			}
		}
		if err := s.Add(rolling.Reading{UnixNano: at.UnixNano(), Value: float64(k % 5)}); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
	return path, t0
}

// count is a Writer that counts records and remembers the first time.
type count struct {
	n     int
	first time.Time
	report.Writer
}

func (c *count) Fit(_, _ string, sol *rolling.Solution, _ rolling.Model) error {
	if c.n == 0 {
		c.first = sol.Last
	}
	c.n++
	return nil
}

func TestHistory_RecentByDefault(t *testing.T) {
	path, t0 := hourlyFile(t)
	src, err := query.Open(path, ingest.BusOptions{Servers: []string{"nats://127.0.0.1:1"}}, "query test")
	if err != nil {
		t.Fatal(err)
	}
	defer src.Close()
	newest := t0.Add(958 * time.Hour) // record 959, the fit up to reading 958
	for _, tc := range []struct {
		name      string
		q         query.HistoryQuery
		n         int
		first     time.Time
		noteWants string
	}{
		// Records from newest − 30 d to newest, one an hour: 30·24 + 1.
		{"recent", query.HistoryQuery{Recent: 30 * 24 * time.Hour}, 721, newest.Add(-30 * 24 * time.Hour), "238 older records from 2026-01-01 on are left out"},
		{"everything", query.HistoryQuery{}, 959, t0, ""},
		// An explicit --since turns the default off: 24 h from t0 + 100 h,
		// since inclusive and until exclusive.
		{"explicit range", query.HistoryQuery{Recent: 30 * 24 * time.Hour, Since: t0.Add(100 * time.Hour), Until: t0.Add(124 * time.Hour)}, 24, t0.Add(100 * time.Hour), ""},
	} {
		t.Run(tc.name, func(t *testing.T) {
			tc.q.Sensor, tc.q.Models = "qm.a", []rolling.Model{rolling.Line}
			c := &count{}
			var note bytes.Buffer
			n, err := query.History(context.Background(), src, tc.q, []report.Writer{c}, &note)
			if err != nil || n != tc.n || c.n != tc.n || !c.first.Equal(tc.first) {
				t.Errorf("History = %d, %v; wrote %d from %v; want %d from %v", n, err, c.n, c.first, tc.n, tc.first)
			}
			if !strings.Contains(note.String(), tc.noteWants) || (tc.noteWants == "") != (note.Len() == 0) {
				t.Errorf("note %q, want %q", note.String(), tc.noteWants)
			}
		})
	}
	_, err = query.History(context.Background(), src, query.HistoryQuery{Sensor: "qm.b"}, nil, &bytes.Buffer{})
	if !errors.Is(err, query.ErrNoHistory) || !strings.Contains(err.Error(), "such as qm.a") {
		t.Errorf("unknown sensor: %v, want ErrNoHistory offering qm.a", err)
	}
}

func TestParseTime(t *testing.T) {
	now := time.Date(2026, 3, 31, 12, 0, 0, 0, time.UTC)
	for _, tc := range []struct {
		in   string
		want time.Time
		bad  bool
	}{
		{"", time.Time{}, false},
		{"2026-03-01T12:00:00+01:00", time.Date(2026, 3, 1, 11, 0, 0, 0, time.UTC), false},
		{"2026-03-01", time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC), false},
		{"30d", now.Add(-30 * 24 * time.Hour), false},
		{"2w", now.Add(-14 * 24 * time.Hour), false},
		{"30x", time.Time{}, true},
		{"-1d", time.Time{}, true},
	} {
		got, err := query.ParseTime("since", tc.in, now)
		var ue *query.UsageError
		if tc.bad != errors.As(err, &ue) || !got.Equal(tc.want) {
			t.Errorf("ParseTime(%q) = %v, %v; want %v (bad %v)", tc.in, got, err, tc.want, tc.bad)
		}
	}
}
