package web

import (
	"math"
	"time"
)

// niceTicks returns ticks at multiples of 1, 2 or 5 × 10^k inside
// [lo, hi], the step whose count of ticks comes nearest n.
func niceTicks(lo, hi float64, n int) []float64 {
	if !(hi > lo) || n < 1 {
		return nil
	}
	raw := (hi - lo) / float64(n)
	mag := math.Pow(10, math.Floor(math.Log10(raw)))
	step := mag
	best := math.Inf(1)
	for _, m := range []float64{1, 2, 5, 10} {
		if d := math.Abs((hi-lo)/(m*mag) - float64(n)); d < best {
			step, best = m*mag, d
		}
	}
	var out []float64
	for v := math.Ceil(lo/step) * step; v <= hi+step*1e-9; v += step {
		if math.Abs(v) < step*1e-9 {
			v = 0
		}
		out = append(out, v)
	}
	return out
}

// timeStep chooses a tick step giving at most about 8 ticks over d.
func timeStep(d time.Duration) time.Duration {
	for _, s := range []time.Duration{time.Minute, 5 * time.Minute, 15 * time.Minute, time.Hour, 3 * time.Hour,
		6 * time.Hour, 12 * time.Hour, day, 2 * day, 7 * day, 14 * day, 28 * day, 91 * day, 182 * day} {
		if d/s <= 8 {
			return s
		}
	}
	return 365 * day
}

// timeTicks returns tick times in [from, to] on multiples of step in loc
// (days start at local midnight).
func timeTicks(from, to time.Time, loc *time.Location) (ticks []time.Time, step time.Duration) {
	step = timeStep(to.Sub(from))
	f := from.In(loc)
	var t time.Time
	if step >= day {
		t = time.Date(f.Year(), f.Month(), f.Day(), 0, 0, 0, 0, loc)
		n := int(step / day)
		for t.Before(from) || (n > 1 && t.YearDay()%n != 0) {
			t = t.AddDate(0, 0, 1)
		}
		for ; !t.After(to); t = t.AddDate(0, 0, n) {
			ticks = append(ticks, t)
		}
		return ticks, step
	}
	t = f.Truncate(step)
	for t.Before(from) {
		t = t.Add(step)
	}
	for ; !t.After(to); t = t.Add(step) {
		ticks = append(ticks, t)
	}
	return ticks, step
}
