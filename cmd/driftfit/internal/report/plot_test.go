package report

import (
	"strconv"
	"testing"
	"time"
)

// TestDateTicks checks that labelled ticks sit on the calendar
// boundaries their labels name (time.Parse of the label gives the tick
// back) and that there are not too many of them.
func TestDateTicks(t *testing.T) {
	base := time.Date(2026, 3, 2, 7, 13, 0, 0, time.UTC)
	for _, span := range []time.Duration{90 * time.Minute, 6 * time.Hour, 40 * time.Hour, 5 * 24 * time.Hour, 21 * 24 * time.Hour, 60 * 24 * time.Hour, 200 * 24 * time.Hour, 800 * 24 * time.Hour, 4000 * 24 * time.Hour} {
		lo, hi := float64(base.Unix()), float64(base.Add(span).Unix())
		ticks := dateTicks{}.Ticks(lo, hi)
		labelled := 0
		for _, tk := range ticks {
			if tk.Value < lo || tk.Value > hi {
				t.Errorf("span %v: tick %v outside [%v, %v]", span, tk.Value, lo, hi)
			}
			if tk.Label == "" {
				continue
			}
			labelled++
			// Labels carry no year (the axis label does), except a
			// January tick on a month scale, which is the year alone.
			var at time.Time
			var err error
		layouts:
			for _, layout := range []string{"Jan 2 15:04", "Jan 2", "Jan", "2006"} {
				for y := base.Year(); y <= base.Add(span).Year(); y++ {
					lbl, lay := tk.Label+" "+strconv.Itoa(y), layout+" 2006"
					if layout == "2006" {
						lbl, lay = tk.Label, layout
					}
					if at, err = time.Parse(lay, lbl); err == nil && float64(at.Unix()) == tk.Value {
						break layouts
					}
				}
			}
			if err != nil || float64(at.Unix()) != tk.Value {
				t.Errorf("span %v: tick at %v labelled %q (%v)", span, time.Unix(int64(tk.Value), 0).UTC(), tk.Label, err)
			}
			// Between about 23 and 77 days the step is a week (twelve
			// labels at most), which starts on Monday (ISO 8601).
			if span > 23*24*time.Hour && span < 77*24*time.Hour && at.Weekday() != time.Monday {
				t.Errorf("span %v: tick %q is not a Monday", span, tk.Label)
			}
		}
		if labelled < 2 || labelled > maxDateTicks {
			t.Errorf("span %v: %d labelled ticks, want 2 to %d", span, labelled, maxDateTicks)
		}
	}
}
