package configs

import (
	"fmt"
	"math"
	"strconv"
	"strings"
	"unicode"
)

// Lengths of the time units a rate may be written in, in days.
//
// A month is the mean Gregorian month, 365.2425/12 = 30.436875 days, and a
// year the mean Gregorian year, 365.2425 days (400-year cycle of 146097 days,
// 146097/400 = 365.2425). Fixed means keep a "per month" limit the same all
// year round; instrument stability figures quoted per month or per year are
// averages anyway.
const (
	daysPerYear  = 365.2425
	daysPerMonth = daysPerYear / 12
)

var rateTimeUnits = map[string]float64{
	"s":     1.0 / 86400,
	"min":   1.0 / 1440,
	"h":     1.0 / 24,
	"d":     1,
	"day":   1,
	"week":  7,
	"month": daysPerMonth,
	"year":  daysPerYear,
}

const rateTimeUnitList = "s, min, h, d, day, week, month, year"

// spanUnit is the pseudo-unit for a percentage of the calibrated span.
const spanUnit = "%span"

// quantity is a number with a unit and, for rates, a time unit and power:
// "0.5 kPa" (power 0), "0.05 %span/month" (power 1), "0.01 kPa/day^2"
// (power 2).
type quantity struct {
	value    float64
	unit     string
	timeUnit string
	power    int
}

// parseQuantity parses s as a quantity of the given time power. The unit of
// a rate is everything before the last "/", so units that contain a slash
// themselves ("mm/s", "m3/h") are written "0.1 mm/s/month". A plain quantity
// (power 0) takes the whole remainder as its unit, so "2 mm/s" is a velocity,
// not a rate. Errors wrap ErrUnit.
func parseQuantity(s string, power int) (quantity, error) {
	fail := func(format string, args ...any) (quantity, error) {
		return quantity{}, &FieldError{Value: s, Err: ErrUnit, Detail: fmt.Sprintf(format, args...)}
	}
	t := strings.TrimSpace(s)
	n := numberPrefix(t)
	if n == 0 {
		return fail("expected a number first, e.g. %q", example(power))
	}
	v, err := strconv.ParseFloat(t[:n], 64)
	if err != nil || math.IsInf(v, 0) || math.IsNaN(v) {
		return fail("number %q out of range", t[:n])
	}
	rest := strings.TrimSpace(t[n:])
	if rest == "" {
		return fail("missing unit, e.g. %q", example(power))
	}
	q := quantity{value: v, power: power}
	if power == 0 {
		q.unit = rest
	} else {
		i := strings.LastIndexByte(rest, '/')
		if i < 0 {
			return fail("a rate needs a time unit after \"/\", e.g. %q", example(power))
		}
		q.unit = strings.TrimSpace(rest[:i])
		tu := strings.TrimSpace(rest[i+1:])
		squared := false
		if u, ok := strings.CutSuffix(tu, "^2"); ok {
			tu, squared = strings.TrimSpace(u), true
		} else if u, ok := strings.CutSuffix(tu, "²"); ok {
			tu, squared = strings.TrimSpace(u), true
		}
		switch {
		case power == 1 && squared:
			return fail("a slope is per time, not per time squared, e.g. %q", example(1))
		case power == 2 && !squared:
			return fail("a curvature is per time squared, e.g. %q", example(2))
		}
		if _, ok := rateTimeUnits[tu]; !ok {
			return fail("unknown time unit %q (use %s)", tu, rateTimeUnitList)
		}
		q.timeUnit = tu
		if q.unit == "" {
			return fail("missing unit before \"/\", e.g. %q", example(power))
		}
	}
	for _, r := range q.unit {
		if unicode.IsSpace(r) || unicode.IsControl(r) {
			return fail("unit %q contains white space", q.unit)
		}
	}
	return q, nil
}

func example(power int) string {
	switch power {
	case 1:
		return "0.2 kPa/day"
	case 2:
		return "0.01 kPa/day^2"
	}
	return "0.5 kPa"
}

// numberPrefix returns the length of the decimal number at the start of s
// (sign, digits, fraction, exponent), or 0 if there is none. "inf" and "nan"
// are not numbers here.
func numberPrefix(s string) int {
	i := 0
	if i < len(s) && (s[i] == '+' || s[i] == '-') {
		i++
	}
	digits := 0
	for i < len(s) && s[i] >= '0' && s[i] <= '9' {
		i++
		digits++
	}
	if i < len(s) && s[i] == '.' {
		i++
		for i < len(s) && s[i] >= '0' && s[i] <= '9' {
			i++
			digits++
		}
	}
	if digits == 0 {
		return 0
	}
	// An exponent only when digits follow, so a unit starting with "e"
	// stays a unit.
	if i < len(s) && (s[i] == 'e' || s[i] == 'E') {
		j := i + 1
		if j < len(s) && (s[j] == '+' || s[j] == '-') {
			j++
		}
		k := j
		for k < len(s) && s[k] >= '0' && s[k] <= '9' {
			k++
		}
		if k > j {
			i = k
		}
	}
	return i
}

// canonical converts q to the class's engineering unit per day^power.
// "%span" means percent of (upper - lower). A unit other than the class unit
// or "%span" is an error wrapping ErrUnitMismatch.
func (q quantity) canonical(classUnit string, span Span) (float64, error) {
	v := q.value
	switch q.unit {
	case spanUnit:
		v = v / 100 * (span.Upper - span.Lower)
	case classUnit:
	default:
		return 0, &FieldError{Err: ErrUnitMismatch, Detail: fmt.Sprintf("unit %q, class unit %q (or %q)", q.unit, classUnit, spanUnit)}
	}
	days := rateTimeUnits[q.timeUnit]
	for range q.power {
		v /= days
	}
	if math.IsInf(v, 0) || math.IsNaN(v) {
		return 0, &FieldError{Err: ErrRange, Detail: "converted value is not finite"}
	}
	return v, nil
}
