package rolling_test

import (
	"fmt"
	"time"

	"driftfit/rolling"
)

// A pressure transmitter reads 100 kPa and drifts up by 0.05 kPa a day;
// a reading every 6 hours for 20 days is fitted over a 30-day window of
// 1-day panes. By hand: the newest reading is at day 19.75, so the level
// is 100 + 0.05·19.75 = 100.9875 and 101.5 kPa is (101.5 − 100.9875)/0.05
// = 10.25 days ahead.
func ExampleSensor_Solve() {
	s, err := rolling.NewSensor(rolling.WindowSpec{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour})
	if err != nil {
		panic(err)
	}
	start := time.Date(2026, 4, 1, 0, 0, 0, 0, time.UTC)
	for i := range 80 {
		at := start.Add(time.Duration(i) * 6 * time.Hour)
		days := at.Sub(start).Hours() / 24
		wiggle := 0.01 * float64(i%3-1) // a small repeating disturbance
		if err := s.Add(rolling.Reading{UnixNano: at.UnixNano(), Value: 100 + 0.05*days + wiggle}); err != nil {
			panic(err)
		}
	}
	f := s.Solve(0).Line
	fmt.Printf("n=%d level=%.3f kPa drift=%.4f±%.4f kPa/day\n", f.N, f.Coef[0], f.Coef[1], f.TCrit*f.SE[1])
	c, _ := f.TimeToLimit(101.5, true, 365*24*time.Hour)
	fmt.Printf("reaches 101.5 kPa: %v, in %.1f days\n", c.Kind, c.At.Hours()/24)
	// Output:
	// n=80 level=100.987 kPa drift=0.0500±0.0003 kPa/day
	// reaches 101.5 kPa: ahead, in 10.2 days
}
