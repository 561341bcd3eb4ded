package rolling_test

import (
	"fmt"
	"math/rand/v2"
	"runtime"
	"sync"
	"testing"
	"time"

	"driftfit/rolling"
)

// The project's speed targets: Add into three windows ≤ 100 ns and 0
// allocations; Solve of one window ≤ 1 µs; the windowed update at least
// 1000× cheaper than a batch refit at N = 10 000; ≤ 8 KiB a sensor with
// the default windows.

const (
	benchDay  = 24 * time.Hour
	benchWeek = 7 * benchDay
)

var (
	// benchWindows are the three windows of the Add benchmark: two share
	// the ring of 1 h panes, the third has its own ring of 1 d panes.
	benchWindows = []rolling.WindowSpec{{Span: benchDay, Pane: time.Hour}, {Span: benchWeek, Pane: time.Hour}, {Span: 30 * benchDay, Pane: benchDay}}
	// benchDefaultWindows are the windows the README reports memory for.
	benchDefaultWindows = []rolling.WindowSpec{{Span: benchDay, Pane: time.Hour}, {Span: 30 * benchDay, Pane: benchDay}}
	benchT0             = time.Date(2026, 4, 1, 0, 0, 0, 0, time.UTC).UnixNano()
)

func benchSensor(tb testing.TB, specs ...rolling.WindowSpec) *rolling.Sensor {
	tb.Helper()
	s, err := rolling.NewSensor(specs...)
	if err != nil {
		tb.Fatal(err)
	}
	return s
}

// benchFill adds a reading every step from t0 up to t0+d, a level of 1000
// drifting 2 a day with noise SD 0.5, and returns the time after the last.
func benchFill(tb testing.TB, s *rolling.Sensor, rng *rand.Rand, t0 int64, d, step time.Duration) int64 {
	tb.Helper()
	t := t0
	for ; t < t0+int64(d); t += int64(step) {
		y := 1000 + 2*float64(t-benchT0)/float64(benchDay) + 0.5*rng.NormFloat64()
		if err := s.Add(rolling.Reading{UnixNano: t, Value: y}); err != nil {
			tb.Fatal(err)
		}
	}
	return t
}

// addBench feeds one reading at a time into a sensor with benchWindows,
// already full, a reading every 10 s with up to 5 s of jitter, so that
// the 1 h ring slides every 360 readings and the 1 d ring every 8640.
type addBench struct {
	s      *rolling.Sensor
	t0     int64
	i      int64
	jitter [addBenchMask + 1]int64
	vals   [addBenchMask + 1]float64
}

const (
	addBenchMask = 1<<12 - 1
	addBenchStep = int64(10 * time.Second)
)

func newAddBench(tb testing.TB) *addBench {
	rng := rand.New(rand.NewPCG(1, 1))
	a := &addBench{s: benchSensor(tb, benchWindows...)}
	a.t0 = benchFill(tb, a.s, rng, benchT0, 30*benchDay, 10*time.Minute)
	for i := range a.jitter {
		a.jitter[i] = rng.Int64N(int64(5 * time.Second))
		a.vals[i] = 1000 + 0.5*rng.NormFloat64()
	}
	return a
}

func (a *addBench) add() error {
	j := a.i & addBenchMask
	err := a.s.Add(rolling.Reading{UnixNano: a.t0 + a.i*addBenchStep + a.jitter[j], Value: a.vals[j]})
	a.i++
	return err
}

func BenchmarkSensor_Add(b *testing.B) {
	a := newAddBench(b)
	b.ReportAllocs()
	for b.Loop() {
		if err := a.add(); err != nil {
			b.Fatal(err)
		}
	}
}

// solveSpecs are the windows of the Solve benchmark, by pane count.
var solveSpecs = []struct {
	panes int
	spec  rolling.WindowSpec
}{
	{24, rolling.WindowSpec{Span: benchDay, Pane: time.Hour}},
	{30, rolling.WindowSpec{Span: 30 * benchDay, Pane: benchDay}},
}

// newSolveBench returns a sensor with one full window of spec, a reading
// every minute in every pane.
func newSolveBench(tb testing.TB, spec rolling.WindowSpec) *rolling.Sensor {
	rng := rand.New(rand.NewPCG(2, 2))
	s := benchSensor(tb, spec)
	benchFill(tb, s, rng, benchT0, spec.Span, time.Minute)
	sol := s.Solve(0)
	if sol.Filled != sol.Panes || !sol.Line.OK() || !sol.Parabola.OK() || !sol.Exp.OK() {
		tb.Fatalf("window %v/%v: %d of %d panes filled, errors %v %v %v",
			spec.Span, spec.Pane, sol.Filled, sol.Panes, sol.Line.Err, sol.Parabola.Err, sol.Exp.Err)
	}
	return s
}

func BenchmarkSensor_Solve(b *testing.B) {
	for _, c := range solveSpecs {
		b.Run(fmt.Sprintf("panes=%d", c.panes), func(b *testing.B) {
			s := newSolveBench(b, c.spec)
			b.ReportAllocs()
			for b.Loop() {
				s.Solve(0)
			}
		})
	}
}

// nsPerOp times op in doublings until a run lasts 100 ms. The testing
// package cannot run a benchmark from inside another (testing.Benchmark
// would wait on the lock the running benchmark holds), so the batch
// benchmarks time the windowed path with this.
func nsPerOp(op func()) float64 {
	for n := 1; ; n *= 2 {
		start := time.Now()
		for range n {
			op()
		}
		if d := time.Since(start); d >= 100*time.Millisecond {
			return float64(d.Nanoseconds()) / float64(n)
		}
	}
}

// windowedCost measures, once per process, one Add and one Solve as
// BenchmarkSensor_Add and the 30-pane case of BenchmarkSensor_Solve do,
// so that the batch benchmarks report their ratio to the windowed path
// from the same run on the same machine.
func windowedCost(tb testing.TB) (addNs, solveNs float64) {
	windowed.once.Do(func() {
		a := newAddBench(tb)
		windowed.addNs = nsPerOp(func() {
			if err := a.add(); err != nil {
				tb.Fatal(err)
			}
		})
		s := newSolveBench(tb, solveSpecs[1].spec)
		windowed.solveNs = nsPerOp(func() { s.Solve(0) })
	})
	return windowed.addNs, windowed.solveNs
}

var windowed struct {
	once           sync.Once
	addNs, solveNs float64
}

// BenchmarkBatchRefit measures what the windowed engine avoids: a full
// least-squares refit of the three models over the N readings of a
// 30-day window by QR (batchFit, the reference of batch_test.go),
// building the design matrices, residuals and standard errors each time.
// x-vs-add is the ratio of its cost to one Add, x-vs-add+solve to one Add
// plus one Solve.
func BenchmarkBatchRefit(b *testing.B) {
	span := 30 * benchDay
	for _, n := range []int{1_000, 10_000, 100_000} {
		b.Run(fmt.Sprintf("N=%d", n), func(b *testing.B) {
			addNs, solveNs := windowedCost(b)
			rng := rand.New(rand.NewPCG(3, uint64(n)))
			rs := make([]batchObs, n)
			for i := range rs {
				t := benchT0 + rng.Int64N(int64(span))
				rs[i] = batchObs{t, 1000 + 2*float64(t-benchT0)/float64(benchDay) + 0.5*rng.NormFloat64()}
			}
			b.ReportAllocs()
			for b.Loop() {
				for _, m := range rolling.Models {
					if _, err := batchFit(rs, m, int64(span)); err != nil {
						b.Fatal(err)
					}
				}
			}
			ns := float64(b.Elapsed().Nanoseconds()) / float64(b.N)
			b.ReportMetric(ns/addNs, "x-vs-add")
			b.ReportMetric(ns/(addNs+solveNs), "x-vs-add+solve")
		})
	}
}

// BenchmarkSensorMemory reports the heap held per sensor with the
// default windows (1 d of 1 h panes and 30 d of 1 d panes, two rings of
// 24 and 30 panes), every pane filled, measured with runtime.ReadMemStats
// after a collection around creating and filling 10 000 sensors. The
// slice holding the sensors is not counted.
func BenchmarkSensorMemory(b *testing.B) {
	const sensors = 10_000
	// Daily readings for 29 days, then hourly on the 30th: every pane of
	// both rings holds a reading.
	var times []int64
	for d := range 29 {
		times = append(times, benchT0+int64(d)*int64(benchDay)+int64(12*time.Hour))
	}
	for h := range 24 {
		times = append(times, benchT0+29*int64(benchDay)+int64(h)*int64(time.Hour))
	}
	fill := func(s *rolling.Sensor) {
		for i, t := range times {
			if err := s.Add(rolling.Reading{UnixNano: t, Value: 1000 + float64(i)}); err != nil {
				b.Fatal(err)
			}
		}
	}
	probe := benchSensor(b, benchDefaultWindows...)
	fill(probe)
	for i := range benchDefaultWindows {
		if sol := probe.Solve(i); sol.Filled != sol.Panes {
			b.Fatalf("window %d: %d of %d panes filled", i, sol.Filled, sol.Panes)
		}
	}
	var perSensor float64
	b.ReportAllocs()
	for b.Loop() {
		var before, after runtime.MemStats
		runtime.GC()
		runtime.ReadMemStats(&before)
		ss := make([]*rolling.Sensor, sensors)
		for i := range ss {
			ss[i] = benchSensor(b, benchDefaultWindows...)
			fill(ss[i])
		}
		runtime.GC()
		runtime.ReadMemStats(&after)
		runtime.KeepAlive(ss)
		held := int64(after.HeapAlloc) - int64(before.HeapAlloc) - int64(sensors*8) // less the slice of pointers
		perSensor = float64(held) / sensors
	}
	b.ReportMetric(perSensor, "B/sensor")
}
