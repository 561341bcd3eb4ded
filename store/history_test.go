package store_test

import (
	"errors"
	"fmt"
	"slices"
	"strings"
	"testing"
	"time"

	"driftfit/rolling"
	"driftfit/store"
)

func readHistory(t *testing.T, db *store.DB, id string, ws rolling.WindowSpec, since, until time.Time) []rolling.Solution {
	t.Helper()
	var out []rolling.Solution
	err := db.History(id, ws, since, until, func(r store.HistoryRecord) error {
		out = append(out, r.Solution)
		return nil
	})
	if err != nil {
		t.Fatalf("History(%s, %v): %v", id, ws, err)
	}
	return out
}

func checkSame(t *testing.T, what string, got, want []rolling.Solution) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%s: %d records, want %d", what, len(got), len(want))
	}
	for i := range got {
		if d := diffSolution(&got[i], &want[i]); d != "" {
			t.Fatalf("%s: record %d: %s", what, i, d)
		}
	}
}

func TestHistory_Range(t *testing.T) {
	const seed = 42
	t.Logf("seed %d", seed)
	db := openDB(t, tempPath(t))
	f := newFeed(t, db, seed, 2, defaultSpecs)
	f.step(3000, 15*time.Minute)
	f.commit()
	id := f.ids[0]
	all := slices.Clone(f.history[id])
	sortSolutions(all)
	if len(all) < 100 {
		t.Fatalf("only %d records to test with", len(all))
	}
	since, until := all[len(all)/4].Last, all[3*len(all)/4].Last
	for _, tc := range []struct {
		name         string
		ws           rolling.WindowSpec
		since, until time.Time
	}{
		{"all", rolling.WindowSpec{}, time.Time{}, time.Time{}},
		{"hourly panes", defaultSpecs[0], time.Time{}, time.Time{}},
		{"daily panes", defaultSpecs[1], time.Time{}, time.Time{}},
		{"since", rolling.WindowSpec{}, since, time.Time{}},
		{"until", rolling.WindowSpec{}, time.Time{}, until},
		{"since until daily", defaultSpecs[1], since, until},
		{"empty range", rolling.WindowSpec{}, until, since},
		{"unknown window", rolling.WindowSpec{Span: 7 * day, Pane: day}, time.Time{}, time.Time{}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var want []rolling.Solution
			for _, s := range all {
				if (tc.ws == rolling.WindowSpec{} || tc.ws == s.Window) &&
					(tc.since.IsZero() || !s.Last.Before(tc.since)) &&
					(tc.until.IsZero() || s.Last.Before(tc.until)) {
					want = append(want, s)
				}
			}
			checkSame(t, tc.name, readHistory(t, db, id, tc.ws, tc.since, tc.until), want)
		})
	}

	stop := errors.New("stop")
	n := 0
	err := db.History(id, rolling.WindowSpec{}, time.Time{}, time.Time{}, func(store.HistoryRecord) error {
		if n++; n == 3 {
			return stop
		}
		return nil
	})
	if err != stop || n != 3 {
		t.Errorf("History with fn failing on the 3rd record: %v after %d calls, want stop after 3", err, n)
	}
}

func TestHistory_SensorsDoNotMix(t *testing.T) {
	db := openDB(t, tempPath(t))
	s, _ := rolling.NewSensor(defaultSpecs...)
	for i := range 3 {
		s.Add(rolling.Reading{UnixNano: int64(i+1) * int64(time.Hour), Value: float64(i)})
	}
	sol := s.Solve(0)
	// Ids where one is a prefix of another, with bytes on either side of
	// the separator's successor.
	ids := []string{"a.b", "a", "a\x01", "b", "a-"}
	var b store.Batch
	for _, id := range ids {
		if err := b.Record(id, &sol); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	var listed []string
	if err := db.HistorySensors(func(id string) error { listed = append(listed, id); return nil }); err != nil {
		t.Fatal(err)
	}
	want := slices.Clone(ids)
	slices.Sort(want) // byte order, as the Go standard library sorts strings
	if !slices.Equal(listed, want) {
		t.Errorf("HistorySensors = %q, want %q", listed, want)
	}
	for _, id := range ids {
		checkSame(t, "History("+id+")", readHistory(t, db, id, rolling.WindowSpec{}, time.Time{}, time.Time{}), []rolling.Solution{sol})
	}
}

func TestBatch_Record_Refused(t *testing.T) {
	s, _ := rolling.NewSensor(defaultSpecs...)
	s.Add(rolling.Reading{UnixNano: 1e9, Value: 1})
	s.Add(rolling.Reading{UnixNano: 2e9, Value: 2})
	good := s.Solve(0)
	for _, tc := range []struct {
		name string
		edit func(*rolling.Solution)
		want string
	}{
		{"zero window", func(s *rolling.Solution) { s.Window = rolling.WindowSpec{} }, "not positive"},
		{"no time", func(s *rolling.Solution) { s.Last = time.Time{} }, "no time"},
		{"foreign error", func(s *rolling.Solution) { s.Line.Err = errors.New("disk full") }, "disk full"},
		{"year 3000", func(s *rolling.Solution) { s.First = time.Date(3000, 1, 1, 0, 0, 0, 0, time.UTC) }, "First"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var b store.Batch
			sol := good
			tc.edit(&sol)
			err := b.Record("x", &sol)
			if !errors.Is(err, store.ErrRecord) || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("Record error = %v, want ErrRecord containing %q", err, tc.want)
			}
			if b.Len() != 0 {
				t.Errorf("Len() = %d after a refused record", b.Len())
			}
		})
	}
}

func TestPruneHistory(t *testing.T) {
	const seed = 99
	t.Logf("seed %d", seed)
	db := openDB(t, tempPath(t))
	f := newFeed(t, db, seed, 4, defaultSpecs)
	f.step(2000, 20*time.Minute)
	f.commit()
	var all []rolling.Solution
	for _, id := range f.ids {
		all = append(all, f.history[id]...)
	}
	sortSolutions(all)
	before := all[len(all)/2].Last
	old := 0
	for _, s := range all {
		if s.Last.Before(before) {
			old++
		}
	}

	if _, _, err := db.PruneHistory(before, 0); err == nil {
		t.Error("PruneHistory with maxDeletes 0 succeeded")
	}
	const chunk = 7
	total, calls := 0, 0
	for {
		n, more, err := db.PruneHistory(before, chunk)
		if err != nil {
			t.Fatal(err)
		}
		calls++
		total += n
		if n > chunk || (more && n != chunk) {
			t.Fatalf("call %d deleted %d with more=%v, chunk %d", calls, n, more, chunk)
		}
		if !more {
			break
		}
	}
	if total != old {
		t.Errorf("PruneHistory deleted %d records, want %d older than %v", total, old, before)
	}
	if want := (old + chunk - 1) / chunk; calls != want && calls != want+1 {
		t.Errorf("took %d calls of %d for %d records", calls, chunk, old)
	}
	for _, id := range f.ids {
		var want []rolling.Solution
		for _, s := range f.history[id] {
			if !s.Last.Before(before) {
				want = append(want, s)
			}
		}
		sortSolutions(want)
		checkSame(t, "after prune "+id, readHistory(t, db, id, rolling.WindowSpec{}, time.Time{}, time.Time{}), want)
	}
	if n, more, err := db.PruneHistory(before, chunk); n != 0 || more || err != nil {
		t.Errorf("second prune: %d, %v, %v; want 0, false, nil", n, more, err)
	}
}

// thinned returns what ThinHistory(before, every) must leave of sols, in
// time order: of the records of windows with panes shorter than every
// and older than before (a day boundary here), the last of each
// interval of every since the epoch.
func thinned(sols []rolling.Solution, before time.Time, every time.Duration) []rolling.Solution {
	sols = slices.Clone(sols)
	sortSolutions(sols)
	var out []rolling.Solution
	for i, s := range sols {
		if s.Window.Pane < every && s.Last.Before(before) {
			g := s.Last.UnixNano() / int64(every) // times are positive here
			later := false
			for _, n := range sols[i+1:] {
				if n.Window == s.Window && n.Last.UnixNano()/int64(every) == g {
					later = true
					break
				}
			}
			if later {
				continue
			}
		}
		out = append(out, s)
	}
	return out
}

func TestThinHistory(t *testing.T) {
	const seed = 31
	t.Logf("seed %d", seed)
	db := openDB(t, tempPath(t))
	f := newFeed(t, db, seed, 3, defaultSpecs)
	f.step(4000, 15*time.Minute) // about 42 days
	f.commit()
	start := time.Unix(0, f.clock).Add(-42 * day)
	if _, _, err := db.ThinHistory(start, 0, 10); err == nil {
		t.Error("ThinHistory with interval 0 succeeded")
	}
	for round, before := range []time.Time{
		start.Add(15 * day).Truncate(day), // Truncate works on absolute time: a UTC day boundary
		start.Add(30 * day).Truncate(day), // resumes where the first round stopped
	} {
		want := map[string][]rolling.Solution{}
		wantDeleted := 0
		for _, id := range f.ids {
			want[id] = thinned(f.history[id], before, day)
			if round == 1 {
				wantDeleted += len(thinned(f.history[id], before.Add(-15*day).Truncate(day), day)) - len(want[id])
			} else {
				wantDeleted += len(f.history[id]) - len(want[id])
			}
		}
		if wantDeleted < 100 {
			t.Fatalf("round %d: only %d records to thin", round, wantDeleted)
		}
		const chunk = 11
		total := 0
		for calls := 1; ; calls++ {
			n, more, err := db.ThinHistory(before, day, chunk)
			if err != nil {
				t.Fatal(err)
			}
			if n > chunk || more && n != chunk || calls > wantDeleted {
				t.Fatalf("round %d call %d: deleted %d, more %v, chunk %d", round, calls, n, more, chunk)
			}
			total += n
			if !more {
				break
			}
		}
		if total != wantDeleted {
			t.Errorf("round %d: ThinHistory deleted %d records, want %d", round, total, wantDeleted)
		}
		for _, id := range f.ids {
			checkSame(t, fmt.Sprintf("round %d %s", round, id), readHistory(t, db, id, rolling.WindowSpec{}, time.Time{}, time.Time{}), want[id])
		}
		if n, more, err := db.ThinHistory(before, day, chunk); n != 0 || more || err != nil {
			t.Errorf("round %d: thinning again: %d, %v, %v; want 0, false, nil", round, n, more, err)
		}
		db = reopen(t, db)
	}
}
