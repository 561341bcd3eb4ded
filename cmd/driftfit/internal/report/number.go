package report

import (
	"math"
	"strconv"
	"time"

	"driftfit/configs"
)

// Rounding for people follows the GUM (JCGM 100:2008, section 7.2.6):
// an uncertainty is given to at most two significant digits, and the
// estimate to the same decimal place, since digits below it carry no
// information.

// Estimate formats v with its uncertainty u (a 95% half-width) as
// "v ±u", both rounded to two significant digits of u. A u that is zero,
// negative or not finite gives v to 6 significant digits alone.
func Estimate(v, u float64) string {
	if !(u > 0) || math.IsInf(u, 0) || math.IsNaN(v) || math.IsInf(v, 0) {
		return Sig(v, 6)
	}
	return Round(v, u) + " ±" + Round(u, u)
}

// Round formats v rounded to the decimal place of the second significant
// digit of u (u > 0).
func Round(v, u float64) string {
	if !(u > 0) || math.IsInf(u, 0) || math.IsNaN(v) || math.IsInf(v, 0) {
		return Sig(v, 6)
	}
	place := int(math.Floor(math.Log10(u))) - 1 // 10^place is the last digit kept
	mag := 0
	if v != 0 {
		mag = int(math.Floor(math.Log10(math.Abs(v))))
	}
	switch {
	case place >= 0 && mag < 15:
		scale := math.Pow(10, float64(place))
		return strconv.FormatFloat(math.Round(v/scale)*scale, 'f', 0, 64)
	case place < 0 && place >= -9 && mag < 15:
		return strconv.FormatFloat(v, 'f', -place, 64)
	}
	// Very large or very small: exponent form, digits down to place.
	return strconv.FormatFloat(v, 'e', max(0, mag-place), 64)
}

// Sig formats v to n significant digits, exponent form only when the
// number is very large or small (strconv 'g').
func Sig(v float64, n int) string {
	return strconv.FormatFloat(v, 'g', n, 64)
}

// WithUnit joins a number and its unit with a space; "" leaves the
// number alone.
func WithUnit(s, unit string) string {
	if unit == "" || s == "" {
		return s
	}
	return s + " " + unit
}

// Duration writes d in the duration syntax of the config file ("30d").
func Duration(d time.Duration) string { return configs.FormatDuration(d) }

// RoundTo returns v rounded as Round writes it, for structured log
// fields: a float64 that prints (shortest form) with the meaningful
// digits only. A u that is zero, negative or not finite leaves 6
// significant digits.
func RoundTo(v, u float64) float64 {
	r, err := strconv.ParseFloat(Round(v, u), 64)
	if err != nil {
		return v
	}
	return r
}
