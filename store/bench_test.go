package store_test

import (
	"fmt"
	"math/rand/v2"
	"testing"
	"time"

	"driftfit/rolling"
	"driftfit/store"
)

// BenchmarkCommit measures one commit of the changed open panes of every
// sensor (one new reading each since the last commit: the hourly and the
// daily pane change), with the stream position, fsync on. The file is
// first filled with two days of hourly readings per sensor. The time per
// op includes Batch.Sensor's snapshots; adding the readings is excluded.
func BenchmarkCommit(b *testing.B) {
	for _, n := range []int{1000, 10000} {
		b.Run(fmt.Sprintf("sensors=%d", n), func(b *testing.B) {
			const seed = 5
			rng := rand.New(rand.NewPCG(seed, seed))
			db, err := store.Open(tempPath(b), store.Options{})
			if err != nil {
				b.Fatal(err)
			}
			b.Cleanup(func() { db.Close() })
			ids := make([]string, n)
			sensors := make([]*rolling.Sensor, n)
			for i := range sensors {
				ids[i] = fmt.Sprintf("plant-south.unit%02d.ft-%05d", i%40, i)
				sensors[i], _ = rolling.NewSensor(defaultSpecs...)
			}
			clock := time.Date(2031, 1, 1, 0, 0, 0, 0, time.UTC).UnixNano()
			add := func() {
				for _, s := range sensors {
					s.Add(rolling.Reading{UnixNano: clock + rng.Int64N(int64(time.Minute)), Value: 20 + rng.NormFloat64()})
				}
			}
			var batch store.Batch
			var seq uint64
			commit := func() store.CommitStats {
				for i, s := range sensors {
					if err := batch.Sensor(ids[i], s); err != nil {
						b.Fatal(err)
					}
				}
				seq++
				batch.SetPosition(seq)
				st, err := db.Commit(&batch)
				if err != nil {
					b.Fatal(err)
				}
				return st
			}
			for range 48 {
				add()
				clock += int64(time.Hour)
			}
			commit()

			b.ReportAllocs()
			var bytes, puts, commits int
			for b.Loop() {
				b.StopTimer()
				clock += int64(time.Minute)
				add()
				b.StartTimer()
				st := commit()
				bytes += st.Bytes
				puts += st.Puts
				commits++
			}
			b.ReportMetric(float64(bytes)/float64(commits), "bytes/commit")
			b.ReportMetric(float64(puts)/float64(commits), "puts/commit")
		})
	}
}

// BenchmarkRestore measures opening a file and rebuilding every sensor
// from its panes (both windows full: 24 hourly and 30 daily panes).
func BenchmarkRestore(b *testing.B) {
	const n = 10000
	path := tempPath(b)
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		b.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(6, 6))
	var batch store.Batch
	clock := time.Date(2031, 1, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	for i := range n {
		s, _ := rolling.NewSensor(defaultSpecs...)
		for h := range 31 * 24 {
			s.Add(rolling.Reading{UnixNano: clock + int64(h)*int64(time.Hour), Value: rng.NormFloat64()})
		}
		if err := batch.Sensor(fmt.Sprintf("plant-south.unit%02d.ft-%05d", i%40, i), s); err != nil {
			b.Fatal(err)
		}
		if i%1000 == 999 {
			if _, err := db.Commit(&batch); err != nil {
				b.Fatal(err)
			}
		}
	}
	db.Close()
	b.ReportAllocs()
	for b.Loop() {
		db, err := store.Open(path, store.Options{})
		if err != nil {
			b.Fatal(err)
		}
		panes := 0
		err = db.Restore(func(string) (*rolling.Sensor, error) { return rolling.NewSensor(defaultSpecs...) },
			func(r store.Restored) error { panes += r.Panes; return nil })
		if err != nil || panes != n*54 {
			b.Fatalf("Restore: %v, %d panes, want %d", err, panes, n*54)
		}
		db.Close()
	}
	b.ReportMetric(n, "sensors")
}
