package report

import (
	"math"
	"strconv"
	"time"

	"gonum.org/v1/plot"

	"driftfit/configs"
)

// yearRange names the calendar year, or years, of a span of Unix
// seconds: "2026" or "2026–2027".
func yearRange(lo, hi float64) string {
	a, b := time.Unix(int64(lo), 0).UTC().Year(), time.Unix(int64(hi), 0).UTC().Year()
	if a == b {
		return strconv.Itoa(a)
	}
	return strconv.Itoa(a) + "–" + strconv.Itoa(b)
}

// unlabelled keeps the tick marks of a Ticker and drops its labels.
type unlabelled struct{ plot.Ticker }

// Ticks implements plot.Ticker.
func (u unlabelled) Ticks(lo, hi float64) []plot.Tick {
	ts := u.Ticker.Ticks(lo, hi)
	for i := range ts {
		ts[i].Label = ""
	}
	return ts
}

// dateTicks puts time-axis ticks (values in Unix seconds) on calendar
// boundaries in UTC: minutes, hours, days, Mondays, first days of months
// or of years,
// whichever step gives at most maxDateTicks labels.
type dateTicks struct{}

// The longest label sets how many fit: "2026-03-01 12:00" about six on a
// 7-inch column at 10 pt, "Mar 9" about twelve (common practice: keep
// labels a label's width apart). The year is in the axis label.
const (
	maxShortTicks = 12
	maxLongTicks  = 6
	hourFormat    = "Jan 2 15:04"
	dayFormat     = "Jan 2"
	monthFormat   = "Jan"
	yearFormat    = "2006"
)

// maxDateTicks is the most labels any step gives.
const maxDateTicks = maxShortTicks

type tickStep struct {
	step, minor time.Duration // fixed steps, aligned to Monday 00:00 UTC for weeks
	months      int           // calendar months instead of step (minor: one month)
	format      string
	max         int // most labels
}

var tickSteps = []tickStep{
	{step: 10 * time.Minute, minor: 5 * time.Minute, format: hourFormat, max: maxLongTicks},
	{step: 15 * time.Minute, minor: 5 * time.Minute, format: hourFormat, max: maxLongTicks},
	{step: 30 * time.Minute, minor: 10 * time.Minute, format: hourFormat, max: maxLongTicks},
	{step: time.Hour, minor: 15 * time.Minute, format: hourFormat, max: maxLongTicks},
	{step: 3 * time.Hour, minor: time.Hour, format: hourFormat, max: maxLongTicks},
	{step: 6 * time.Hour, minor: time.Hour, format: hourFormat, max: maxLongTicks},
	{step: 12 * time.Hour, minor: 3 * time.Hour, format: hourFormat, max: maxLongTicks},
	{step: configs.Day, minor: 6 * time.Hour, format: dayFormat, max: maxShortTicks},
	{step: 2 * configs.Day, minor: configs.Day, format: dayFormat, max: maxShortTicks},
	{step: 7 * configs.Day, minor: configs.Day, format: dayFormat, max: maxShortTicks},
	{step: 14 * configs.Day, minor: 7 * configs.Day, format: dayFormat, max: maxShortTicks},
	{months: 1, format: monthFormat, max: maxShortTicks},
	{months: 2, format: monthFormat, max: maxShortTicks},
	{months: 3, format: monthFormat, max: maxShortTicks},
	{months: 6, format: monthFormat, max: maxShortTicks},
	{months: 12, format: yearFormat, max: maxShortTicks},
	{months: 24, format: yearFormat, max: maxShortTicks},
	{months: 60, format: yearFormat, max: maxShortTicks},
	{months: 120, format: yearFormat, max: maxShortTicks},
}

// mondayOffset is where weeks start relative to the Unix epoch, a
// Thursday (1970-01-01): four days later is Monday 1970-01-05.
const mondayOffset = 4 * configs.Day

// Ticks implements plot.Ticker.
func (dateTicks) Ticks(lo, hi float64) []plot.Tick {
	if !(hi > lo) || math.IsInf(lo, 0) || math.IsInf(hi, 0) {
		return []plot.Tick{{Value: lo, Label: time.Unix(int64(lo), 0).UTC().Format("2006-01-02 15:04")}}
	}
	for _, st := range tickSteps {
		var n int
		if st.months > 0 {
			n = int((hi-lo)/(30.4*86400))/st.months + 1
		} else {
			n = int((hi-lo)/st.step.Seconds()) + 1
		}
		if n <= st.max || st.months == tickSteps[len(tickSteps)-1].months {
			return st.ticks(lo, hi)
		}
	}
	return nil
}

func (st tickStep) ticks(lo, hi float64) []plot.Tick {
	var out []plot.Tick
	if st.months > 0 {
		t0 := time.Unix(int64(math.Floor(lo)), 0).UTC()
		m := time.Date(t0.Year(), t0.Month(), 1, 0, 0, 0, 0, time.UTC)
		for k := 0; ; k++ {
			t := m.AddDate(0, k, 0)
			v := float64(t.Unix())
			if v > hi {
				return out
			}
			if v < lo {
				continue
			}
			tk := plot.Tick{Value: v}
			if (t.Year()*12+int(t.Month())-1)%st.months == 0 {
				tk.Label = t.Format(st.format)
				if t.Month() == time.January {
					// The year turns: name it where it does.
					tk.Label = t.Format(yearFormat)
				}
			}
			out = append(out, tk)
		}
	}
	offset := int64(0)
	if st.step%(7*configs.Day) == 0 {
		offset = int64(mondayOffset / time.Second)
	}
	minor := int64(st.minor / time.Second)
	major := int64(st.step / time.Second)
	first := floorDiv(int64(math.Floor(lo))-offset, minor)*minor + offset
	for s := first; float64(s) <= hi; s += minor {
		if float64(s) < lo {
			continue
		}
		tk := plot.Tick{Value: float64(s)}
		if (s-offset)%major == 0 {
			tk.Label = time.Unix(s, 0).UTC().Format(st.format)
		}
		out = append(out, tk)
	}
	return out
}

// floorDiv divides rounding towards minus infinity, so times before the
// epoch land on the same grid.
func floorDiv(a, b int64) int64 {
	q := a / b
	if (a%b != 0) && ((a < 0) != (b < 0)) {
		q--
	}
	return q
}
