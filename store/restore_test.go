package store_test

import (
	"cmp"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"slices"
	"testing"
	"time"

	"driftfit/rolling"
	"driftfit/store"
)

var defaultSpecs = []rolling.WindowSpec{{Span: day, Pane: hour}, {Span: 30 * day, Pane: day}}

// feed drives sensors the way the service does: before each reading, the
// fits of the windows whose newest pane it closes go into the batch as
// history; every commitEvery readings the changed sensors and the count
// of readings applied so far (the stream position) are committed.
type feed struct {
	t        testing.TB
	db       *store.DB
	rng      *rand.Rand
	ids      []string
	sensors  map[string]*rolling.Sensor
	twins    map[string]*rolling.Sensor // optional: receive the same readings
	lastT    map[string]int64
	history  map[string][]rolling.Solution
	batch    store.Batch
	touched  map[string]bool
	applied  uint64
	clock    int64
	every    int
	commits  int
	maxBytes int
}

func newFeed(t testing.TB, db *store.DB, seed uint64, n int, specs []rolling.WindowSpec) *feed {
	f := &feed{
		t: t, db: db, rng: rand.New(rand.NewPCG(seed, seed^0x5eed)),
		sensors: map[string]*rolling.Sensor{}, lastT: map[string]int64{},
		history: map[string][]rolling.Solution{}, touched: map[string]bool{},
		clock: time.Date(2031, 3, 1, 0, 0, 0, 0, time.UTC).UnixNano(), every: 97,
	}
	for i := range n {
		id := fmt.Sprintf("plant-north.line%d.tt-%03d", i%3, i)
		s, err := rolling.NewSensor(specs...)
		if err != nil {
			t.Fatal(err)
		}
		f.ids = append(f.ids, id)
		f.sensors[id] = s
	}
	return f
}

// reading makes the next reading of sensor i: a level with drift, noise,
// and for odd sensors values crossing zero (so exp fits exclude some);
// one reading in twenty arrives up to three days late.
func (f *feed) reading(i int) rolling.Reading {
	t := f.clock
	if f.rng.IntN(20) == 0 {
		t -= f.rng.Int64N(int64(3 * day))
	}
	days := float64(t) / 86400e9
	v := 100 + float64(i) + 0.01*float64(i)*(days-22700) + f.rng.NormFloat64()
	if i%2 == 1 {
		v = 0.5*math.Sin(days) + 0.3*f.rng.NormFloat64()
	}
	return rolling.Reading{UnixNano: t, Value: v}
}

// step applies n readings spread over the sensors, advancing the clock
// by about step each.
func (f *feed) step(n int, step time.Duration) {
	f.t.Helper()
	for range n {
		f.clock += int64(step)/2 + f.rng.Int64N(int64(step))
		i := f.rng.IntN(len(f.ids))
		id := f.ids[i]
		r := f.reading(i)
		s := f.sensors[id]
		mask := s.Closes(r.UnixNano)
		for w := range s.Windows() {
			if mask&(1<<w) == 0 {
				continue
			}
			sol := s.Solve(w)
			if err := f.batch.Record(id, &sol); err != nil {
				f.t.Fatalf("Record(%s): %v", id, err)
			}
			f.history[id] = append(f.history[id], sol)
		}
		err := s.Add(r)
		if err != nil && !errors.Is(err, rolling.ErrTooOld) {
			f.t.Fatalf("Add: %v", err)
		}
		if tw := f.twins[id]; tw != nil {
			if err2 := tw.Add(r); (err2 == nil) != (err == nil) {
				f.t.Fatalf("Add to twin of %s: %v, live: %v", id, err2, err)
			}
		}
		f.lastT[id] = max(f.lastT[id], r.UnixNano)
		f.touched[id] = true
		f.applied++
		if f.applied%uint64(f.every) == 0 {
			f.commit()
		}
	}
}

func (f *feed) commit() {
	f.t.Helper()
	for id := range f.touched {
		if err := f.batch.Sensor(id, f.sensors[id]); err != nil {
			f.t.Fatalf("Sensor(%s): %v", id, err)
		}
	}
	clear(f.touched)
	f.batch.SetPosition(f.applied)
	st, err := f.db.Commit(&f.batch)
	if err != nil {
		f.t.Fatalf("Commit: %v", err)
	}
	f.commits++
	f.maxBytes = max(f.maxBytes, st.Bytes)
}

// heldPanes counts the non-empty panes sensor s holds, by probing every
// index from its horizon to the newest reading's pane.
func heldPanes(s *rolling.Sensor, lastT int64) int {
	n := 0
	s.Horizon(func(width time.Duration, oldest int64) {
		newest := lastT / int64(width) // times are positive here
		for k := oldest; k <= newest; k++ {
			if len(s.AppendPane(nil, rolling.PaneKey{Width: width, Index: k})) > 0 {
				n++
			}
		}
	})
	return n
}

// diffFit describes the first difference between two fits, comparing
// floats by their bits; "" when identical.
func diffFit(a, b *rolling.Fit) string {
	if a.Model != b.Model || a.Err != b.Err || a.N != b.N || a.Excluded != b.Excluded || a.DF != b.DF || a.PosDef != b.PosDef {
		return fmt.Sprintf("header %v/%v/%d/%d/%d/%v vs %v/%v/%d/%d/%d/%v",
			a.Model, a.Err, a.N, a.Excluded, a.DF, a.PosDef, b.Model, b.Err, b.N, b.Excluded, b.DF, b.PosDef)
	}
	if a.First != b.First || a.Last != b.Last {
		return fmt.Sprintf("times %v..%v vs %v..%v", a.First, a.Last, b.First, b.Last)
	}
	fa := []float64{a.ResidSD, a.R2, a.TCrit, a.Cond}
	fb := []float64{b.ResidSD, b.R2, b.TCrit, b.Cond}
	for i := range 3 {
		fa = append(fa, a.Coef[i], a.SE[i], a.CI[i][0], a.CI[i][1], a.Cov[i][0], a.Cov[i][1], a.Cov[i][2])
		fb = append(fb, b.Coef[i], b.SE[i], b.CI[i][0], b.CI[i][1], b.Cov[i][0], b.Cov[i][1], b.Cov[i][2])
	}
	for i := range fa {
		if math.Float64bits(fa[i]) != math.Float64bits(fb[i]) {
			return fmt.Sprintf("float %d: %v vs %v", i, fa[i], fb[i])
		}
	}
	return ""
}

func diffSolution(a, b *rolling.Solution) string {
	if a.Window != b.Window || a.Panes != b.Panes || a.Filled != b.Filled || a.N != b.N || a.First != b.First || a.Last != b.Last {
		return fmt.Sprintf("header %+v vs %+v", *a, *b)
	}
	for _, m := range rolling.Models {
		if d := diffFit(a.Fit(m), b.Fit(m)); d != "" {
			return m.String() + ": " + d
		}
	}
	return ""
}

func restoreAll(t testing.TB, db *store.DB, specs []rolling.WindowSpec) map[string]store.Restored {
	t.Helper()
	got := map[string]store.Restored{}
	err := db.Restore(func(string) (*rolling.Sensor, error) {
		return rolling.NewSensor(specs...)
	}, func(r store.Restored) error {
		got[r.ID] = r
		return nil
	})
	if err != nil {
		t.Fatalf("Restore: %v", err)
	}
	return got
}

func TestRestore_ExactRoundTrip(t *testing.T) {
	const seed = 20310301
	t.Logf("seed %d", seed)
	db := openDB(t, tempPath(t))
	f := newFeed(t, db, seed, 8, defaultSpecs)
	// About 50 days at one reading per ~4 minutes over 8 sensors: the
	// 30-day window slides, so horizon deletes happen.
	f.step(18000, 4*time.Minute)
	f.commit()
	t.Logf("%d commits, largest %d bytes", f.commits, f.maxBytes)

	db = reopen(t, db)
	f.db = db
	if pos, err := db.Position(); err != nil || pos != f.applied {
		t.Fatalf("Position() = %d, %v, want %d", pos, err, f.applied)
	}
	got := restoreAll(t, db, defaultSpecs)
	if len(got) != len(f.ids) {
		t.Fatalf("restored %d sensors, want %d", len(got), len(f.ids))
	}
	for _, id := range f.ids {
		r, live := got[id], f.sensors[id]
		if r.Changed || r.Dropped != 0 {
			t.Errorf("%s: Changed %v, Dropped %d; want false, 0 (horizon deletes keep the file tidy)", id, r.Changed, r.Dropped)
		}
		if want := heldPanes(live, f.lastT[id]); r.Panes != want {
			t.Errorf("%s: restored %d panes, live sensor holds %d", id, r.Panes, want)
		}
		for w := range live.Windows() {
			a, b := live.Solve(w), r.Sensor.Solve(w)
			if d := diffSolution(&a, &b); d != "" {
				t.Errorf("%s window %d: restored Solve differs: %s", id, w, d)
			}
		}
	}
	if t.Failed() {
		return
	}

	// Later readings keep live and restored sensors identical.
	f.twins = map[string]*rolling.Sensor{}
	for id, r := range got {
		f.twins[id] = r.Sensor
	}
	f.step(4000, 4*time.Minute)
	for _, id := range f.ids {
		for w := range f.sensors[id].Windows() {
			a, b := f.sensors[id].Solve(w), f.twins[id].Solve(w)
			if d := diffSolution(&a, &b); d != "" {
				t.Errorf("%s window %d after more readings: %s", id, w, d)
			}
		}
	}

	// Fit history reads back exactly as recorded, in time order.
	f.commit()
	for _, id := range f.ids {
		var read []rolling.Solution
		err := db.History(id, rolling.WindowSpec{}, time.Time{}, time.Time{}, func(r store.HistoryRecord) error {
			if r.Sensor != id {
				t.Errorf("record of %s carries sensor %s", id, r.Sensor)
			}
			read = append(read, r.Solution)
			return nil
		})
		if err != nil {
			t.Fatal(err)
		}
		want := f.history[id]
		if len(read) != len(want) {
			t.Fatalf("%s: History returned %d records, recorded %d", id, len(read), len(want))
		}
		sortSolutions(want)
		for i := range read {
			if d := diffSolution(&read[i], &want[i]); d != "" {
				t.Fatalf("%s record %d: %s", id, i, d)
			}
		}
	}
}

// sortSolutions orders records as History returns them for all windows:
// by time, ties by window (span, then pane).
func sortSolutions(s []rolling.Solution) {
	slices.SortStableFunc(s, func(a, b rolling.Solution) int {
		return cmp.Or(a.Last.Compare(b.Last), cmp.Compare(a.Window.Span, b.Window.Span), cmp.Compare(a.Window.Pane, b.Window.Pane))
	})
}

func TestRestore_ChangedWindows(t *testing.T) {
	const seed = 7
	t.Logf("seed %d", seed)
	db := openDB(t, tempPath(t))
	f := newFeed(t, db, seed, 3, defaultSpecs)
	// Twins with a 7-day window of 1-day panes see the same readings.
	short := []rolling.WindowSpec{{Span: day, Pane: hour}, {Span: 7 * day, Pane: day}}
	f.twins = map[string]*rolling.Sensor{}
	for _, id := range f.ids {
		f.twins[id], _ = rolling.NewSensor(short...)
	}
	f.step(6000, 10*time.Minute) // about 40 days
	f.commit()

	// Shorter day window: panes of both widths carry over; the day panes
	// older than 7 days are dropped and deleted.
	db = reopen(t, db)
	got := restoreAll(t, db, short)
	for _, id := range f.ids {
		r := got[id]
		if !r.Changed || !slices.Equal(r.Saved, defaultSpecs) {
			t.Errorf("%s: Changed %v, Saved %v; want true, %v", id, r.Changed, r.Saved, defaultSpecs)
		}
		held, kept := heldPanes(f.sensors[id], f.lastT[id]), heldPanes(r.Sensor, f.lastT[id])
		if r.Panes != kept || r.Dropped != held-kept || r.Dropped < 20 {
			t.Errorf("%s: Panes %d, Dropped %d; want %d, %d (≥ 20: day panes 8 to 30 days old)", id, r.Panes, r.Dropped, kept, held-kept)
		}
		// The windows held in the 7-day ring are the twin's exactly:
		// a pane's sums do not depend on the window span.
		for w := range r.Sensor.Windows() {
			a, b := r.Sensor.Solve(w), f.twins[id].Solve(w)
			if d := diffSolution(&a, &b); d != "" {
				t.Errorf("%s window %v: restored with new windows differs from twin: %s", id, short[w].Span, d)
			}
		}
	}
	db = reopen(t, db)
	got = restoreAll(t, db, short)
	for _, id := range f.ids {
		if r := got[id]; r.Dropped != 0 || !r.Changed {
			t.Errorf("%s second restore: Dropped %d, Changed %v; want 0, true", id, r.Dropped, r.Changed)
		}
	}

	// Saving a sensor records its new windows.
	var b store.Batch
	for _, r := range got {
		if err := b.Sensor(r.ID, r.Sensor); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	for id, r := range restoreAll(t, db, short) {
		if r.Changed {
			t.Errorf("%s: Changed after saving with the new windows", id)
		}
	}

	// A width no window uses any more: all its panes are dropped.
	hourly := []rolling.WindowSpec{{Span: day, Pane: hour}}
	got = restoreAll(t, db, hourly)
	for _, id := range f.ids {
		if r := got[id]; r.Dropped != 7 && r.Dropped != 8 {
			t.Errorf("%s: Dropped %d day panes, want 7 or 8", id, r.Dropped)
		}
	}
	for id, r := range restoreAll(t, db, hourly) {
		if r.Dropped != 0 {
			t.Errorf("%s: %d panes dropped again: the first restore did not delete them", id, r.Dropped)
		}
	}
}

func TestRestore_SkipAndErrors(t *testing.T) {
	db := openDB(t, tempPath(t))
	f := newFeed(t, db, 11, 3, defaultSpecs)
	f.step(500, 10*time.Minute)
	f.commit()

	// newSensor returning nil leaves a sensor out and its panes in place.
	skip := f.ids[1]
	n := 0
	err := db.Restore(func(id string) (*rolling.Sensor, error) {
		if id == skip {
			return nil, nil
		}
		return rolling.NewSensor(defaultSpecs...)
	}, func(r store.Restored) error {
		if r.ID == skip {
			t.Errorf("skipped sensor %s restored", skip)
		}
		n++
		return nil
	})
	if err != nil || n != 2 {
		t.Fatalf("Restore with one skipped: %v, %d sensors; want nil, 2", err, n)
	}
	if r := restoreAll(t, db, defaultSpecs)[skip]; r.Panes == 0 {
		t.Errorf("skipped sensor lost its panes")
	}

	boom := errors.New("boom")
	err = db.Restore(func(id string) (*rolling.Sensor, error) { return nil, boom }, func(store.Restored) error { return nil })
	if !errors.Is(err, boom) {
		t.Errorf("Restore with failing newSensor: %v, want it to wrap boom", err)
	}
	err = db.Restore(func(id string) (*rolling.Sensor, error) { return rolling.NewSensor(defaultSpecs...) },
		func(store.Restored) error { return boom })
	if !errors.Is(err, boom) {
		t.Errorf("Restore with failing fn: %v, want it to wrap boom", err)
	}
}

// TestRestore_Shards restores a file large enough to be read by several
// goroutines, with fewer windows than it was written with: every sensor
// comes back in id order with the fits of the live sensor, and the panes
// of the dropped width are deleted from every range.
func TestRestore_Shards(t *testing.T) {
	defer runtime.GOMAXPROCS(runtime.GOMAXPROCS(max(4, runtime.GOMAXPROCS(0))))
	const n = 12000
	db := openDB(t, tempPath(t))
	clock := time.Date(2031, 3, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	live := map[string]*rolling.Sensor{}
	var batch store.Batch
	for i := range n {
		id := fmt.Sprintf("plant-east.%05d", (i*7919)%n) // written out of id order
		s, err := rolling.NewSensor(defaultSpecs...)
		if err != nil {
			t.Fatal(err)
		}
		for h := range 30 {
			if err := s.Add(rolling.Reading{UnixNano: clock + int64(h)*int64(hour), Value: float64(i%97) + 0.1*float64(h)}); err != nil {
				t.Fatal(err)
			}
		}
		if err := batch.Sensor(id, s); err != nil {
			t.Fatal(err)
		}
		live[id] = s
		if i%2000 == 1999 {
			if _, err := db.Commit(&batch); err != nil {
				t.Fatal(err)
			}
		}
	}
	hourly := defaultSpecs[:1]
	var order []string
	dropped := 0
	err := db.Restore(func(string) (*rolling.Sensor, error) { return rolling.NewSensor(hourly...) },
		func(r store.Restored) error {
			order = append(order, r.ID)
			dropped += r.Dropped
			a, b := live[r.ID].Solve(0), r.Sensor.Solve(0)
			if d := diffSolution(&a, &b); d != "" {
				t.Errorf("%s: restored fit differs: %s", r.ID, d)
			}
			return nil
		})
	if err != nil {
		t.Fatal(err)
	}
	if len(order) != n || !slices.IsSorted(order) {
		t.Fatalf("restored %d sensors, sorted %v; want %d in id order", len(order), slices.IsSorted(order), n)
	}
	// 30 hourly readings from midnight touch two daily panes.
	if dropped != 2*n {
		t.Errorf("dropped %d panes, want %d (two daily panes a sensor)", dropped, 2*n)
	}
	got := restoreAll(t, db, hourly)
	for id, r := range got {
		if r.Dropped != 0 {
			t.Fatalf("%s: %d panes dropped again: the first restore did not delete them", id, r.Dropped)
		}
	}
}

// TestRestore_RestartTime checks that the restart time set for a sensor
// comes back with it, and that other sensors carry none.
func TestRestore_RestartTime(t *testing.T) {
	db := openDB(t, tempPath(t))
	at := time.Date(2031, 6, 1, 8, 30, 0, 0, time.UTC).UnixNano()
	var b store.Batch
	for _, id := range []string{"plant-west.pt-1", "plant-west.pt-2"} {
		s, err := rolling.NewSensor(defaultSpecs...)
		if err != nil {
			t.Fatal(err)
		}
		if err := s.Add(rolling.Reading{UnixNano: at + int64(time.Hour), Value: 1}); err != nil {
			t.Fatal(err)
		}
		if err := b.Sensor(id, s); err != nil {
			t.Fatal(err)
		}
	}
	if err := b.SetRestart("plant-west.pt-2", at); err != nil {
		t.Fatal(err)
	}
	if err := b.SetRestart("", at); !errors.Is(err, store.ErrSensorID) {
		t.Errorf("SetRestart with an empty id: %v, want ErrSensorID", err)
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	db = reopen(t, db)
	got := restoreAll(t, db, defaultSpecs)
	if r1, r2 := got["plant-west.pt-1"].Restart, got["plant-west.pt-2"].Restart; r1 != 0 || r2 != at {
		t.Errorf("restart times %d and %d, want 0 and %d", r1, r2, at)
	}
}

// TestRestore_Seq checks that the stream sequence stored with a sensor
// comes back with it, the last of two in one commit winning, whether the
// commit takes the sorted path or not, and that other sensors carry none;
// a sequence at or below the position the commit stores is not written
// (a restart reads on after the position anyway).
func TestRestore_Seq(t *testing.T) {
	for _, c := range []struct {
		sorted bool
		pos    uint64
	}{{true, 0}, {false, 0}, {true, 20}, {false, 20}} {
		sorted := c.sorted
		db := openDB(t, tempPath(t))
		var b store.Batch
		for _, id := range []string{"plant-west.pt-1", "plant-west.pt-2", "plant-west.pt-3"} {
			s, err := rolling.NewSensor(defaultSpecs...)
			if err != nil {
				t.Fatal(err)
			}
			if err := s.Add(rolling.Reading{UnixNano: time.Date(2026, 6, 1, 8, 0, 0, 0, time.UTC).UnixNano(), Value: 1}); err != nil {
				t.Fatal(err)
			}
			if err := b.Sensor(id, s); err != nil {
				t.Fatal(err)
			}
		}
		if !sorted {
			// A drop keeps the batch order (no sorted puts).
			if err := b.DropPanes("plant-west.pt-9"); err != nil {
				t.Fatal(err)
			}
		}
		for _, set := range []struct {
			id  string
			seq uint64
		}{{"plant-west.pt-3", 7}, {"plant-west.pt-1", 12}, {"plant-west.pt-3", 40}} {
			if err := b.SetSeq(set.id, set.seq); err != nil {
				t.Fatal(err)
			}
		}
		want1 := uint64(12)
		if c.pos != 0 {
			b.SetPosition(c.pos)
			want1 = 0 // 12 is below the position
		}
		if _, err := db.Commit(&b); err != nil {
			t.Fatal(err)
		}
		db = reopen(t, db)
		got := restoreAll(t, db, defaultSpecs)
		if s1, s2, s3 := got["plant-west.pt-1"].Seq, got["plant-west.pt-2"].Seq, got["plant-west.pt-3"].Seq; s1 != want1 || s2 != 0 || s3 != 40 {
			t.Errorf("sorted %v, position %d: seqs %d, %d, %d; want %d, 0, 40", sorted, c.pos, s1, s2, s3, want1)
		}
	}
}
