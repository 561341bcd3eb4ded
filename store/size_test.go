package store_test

import (
	"fmt"
	"io"
	"math/rand/v2"
	"testing"
	"time"

	"driftfit/rolling"
	"driftfit/store"
)

// fleetSize writes the history of n sensors over days days with the
// default windows (configs/defaults.go: 1d/1h and 30d/1d) the way the
// service does: one reading every ten minutes per sensor, before each
// reading the fits of the windows whose newest pane it closes recorded,
// and a commit of every touched sensor with the stream position every
// ten simulated minutes. thin, when set, is called after each simulated
// day with that day's time, as the service's retention loop would. It
// returns the bytes of file in use (bbolt's high-water mark, what
// Snapshot copies) divided by n·days.
func fleetSize(tb testing.TB, n, days int, thin func(db *store.DB, now time.Time)) (perSensorDay float64, records int) {
	tb.Helper()
	db, err := store.Open(tempPath(tb), store.Options{NoSync: true})
	if err != nil {
		tb.Fatal(err)
	}
	tb.Cleanup(func() { db.Close() })
	const seed = 400
	rng := rand.New(rand.NewPCG(seed, seed))
	ids := make([]string, n)
	sensors := make([]*rolling.Sensor, n)
	for i := range sensors {
		ids[i] = fmt.Sprintf("qm.u%d.steam.pt-%04d", i%4, i)
		if sensors[i], err = rolling.NewSensor(defaultSpecs...); err != nil {
			tb.Fatal(err)
		}
	}
	t0 := time.Date(2031, 1, 1, 0, 0, 0, 0, time.UTC)
	var batch store.Batch
	var seq uint64
	const step = 10 * time.Minute
	for k := range days * int(day/step) {
		at := t0.Add(time.Duration(k) * step)
		for i, s := range sensors {
			r := rolling.Reading{UnixNano: at.UnixNano() + rng.Int64N(int64(step)), Value: 1000 + 0.2*float64(k)/144 + rng.NormFloat64()}
			mask := s.Closes(r.UnixNano)
			for w := range s.Windows() {
				if mask&(1<<w) != 0 {
					sol := s.Solve(w)
					if err := batch.Record(ids[i], &sol); err != nil {
						tb.Fatal(err)
					}
					records++
				}
			}
			if err := s.Add(r); err != nil {
				tb.Fatal(err)
			}
			if err := batch.Sensor(ids[i], s); err != nil {
				tb.Fatal(err)
			}
		}
		seq++
		batch.SetPosition(seq)
		if _, err := db.Commit(&batch); err != nil {
			tb.Fatal(err)
		}
		if thin != nil && (k+1)%int(day/step) == 0 {
			thin(db, at)
		}
	}
	used, err := db.Snapshot(io.Discard)
	if err != nil {
		tb.Fatal(err)
	}
	db.Close()
	return float64(used) / float64(n*days), records
}

// thinAndPrune is what the service's retention loop does once a day in
// these measurements: thin the short windows' history older than 30
// days to one record a day, and delete history older than 400 days (the
// default store.history_retention), in chunks of 500.
func thinAndPrune(tb testing.TB) func(db *store.DB, now time.Time) {
	return func(db *store.DB, now time.Time) {
		for more := true; more; {
			var err error
			if _, more, err = db.ThinHistory(now.Add(-30*day), day, 500); err != nil {
				tb.Fatal(err)
			}
		}
		for more := true; more; {
			var err error
			if _, more, err = db.PruneHistory(now.Add(-400*day), 500); err != nil {
				tb.Fatal(err)
			}
		}
	}
}

// BenchmarkHistorySize reports the file bytes a sensor-day costs with
// the default windows: for a month and for 400 days with all history
// kept, and for 400 days with the short windows thinned after 30 days.
func BenchmarkHistorySize(b *testing.B) {
	for _, c := range []struct {
		n, days int
		thin    bool
	}{{100, 30, false}, {20, 400, false}, {20, 400, true}} {
		name := fmt.Sprintf("sensors=%d/days=%d", c.n, c.days)
		if c.thin {
			name += "/thin=30d"
		}
		b.Run(name, func(b *testing.B) {
			var per float64
			var recs int
			for b.Loop() {
				var thin func(*store.DB, time.Time)
				if c.thin {
					thin = thinAndPrune(b)
				}
				per, recs = fleetSize(b, c.n, c.days, thin)
			}
			b.ReportMetric(per, "B/sensor-day")
			b.ReportMetric(float64(recs)/float64(c.n*c.days), "records/sensor-day")
		})
	}
}
