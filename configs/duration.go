package configs

import (
	"errors"
	"strconv"
	"strings"
	"time"
)

// Day and Week are the lengths of the "d" and "w" duration units: exactly 24
// and 168 hours. Files speak in days ("400d") because retention and drift
// horizons are planned in days; calendar effects (DST, leap seconds) do not
// matter at that scale.
const (
	Day  = 24 * time.Hour
	Week = 7 * Day
)

var durationUnits = map[string]uint64{
	"ns": uint64(time.Nanosecond),
	"us": uint64(time.Microsecond),
	"µs": uint64(time.Microsecond), // U+00B5 micro sign
	"μs": uint64(time.Microsecond), // U+03BC Greek mu
	"ms": uint64(time.Millisecond),
	"s":  uint64(time.Second),
	"m":  uint64(time.Minute),
	"h":  uint64(time.Hour),
	"d":  uint64(Day),
	"w":  uint64(Week),
}

var errDurationSyntax = errors.New("expected a number followed by a unit (ns, us, ms, s, m, h, d, w), e.g. \"200ms\", \"1d\", \"1w2d\"")

// ParseDuration parses a duration written as in Go's time.ParseDuration
// ("1h30m", "200ms", "-1.5h") with two more units: "d" (24 h) and "w"
// (7 d). For input without d or w the result equals time.ParseDuration's.
// "m" is minutes, as in Go; months and years are not durations here because
// their length varies. The bare number "0" is accepted. Errors wrap
// ErrDuration.
func ParseDuration(s string) (time.Duration, error) {
	orig := s
	neg := false
	if s != "" && (s[0] == '-' || s[0] == '+') {
		neg = s[0] == '-'
		s = s[1:]
	}
	if s == "0" {
		return 0, nil
	}
	if s == "" {
		return 0, durationError(orig, errDurationSyntax)
	}
	if strings.ContainsAny(s, " \t") {
		return 0, durationError(orig, errors.New("no spaces inside a duration, e.g. \"5m\" or \"1d12h\""))
	}
	var total uint64
	for s != "" {
		// Integer part.
		i := 0
		for i < len(s) && s[i] >= '0' && s[i] <= '9' {
			i++
		}
		intPart, rest := s[:i], s[i:]
		fracPart := ""
		if rest != "" && rest[0] == '.' {
			rest = rest[1:]
			j := 0
			for j < len(rest) && rest[j] >= '0' && rest[j] <= '9' {
				j++
			}
			fracPart, rest = rest[:j], rest[j:]
			if intPart == "" && fracPart == "" {
				return 0, durationError(orig, errDurationSyntax)
			}
		} else if intPart == "" {
			return 0, durationError(orig, errDurationSyntax)
		}
		j := 0
		for j < len(rest) && rest[j] != '.' && (rest[j] < '0' || rest[j] > '9') {
			j++
		}
		unitName := rest[:j]
		s = rest[j:]
		unit, ok := durationUnits[unitName]
		if !ok {
			if unitName == "" {
				return 0, durationError(orig, errors.New("missing unit (ns, us, ms, s, m, h, d, w)"))
			}
			return 0, durationError(orig, errors.New("unknown unit "+strconv.Quote(unitName)+" (use ns, us, ms, s, m, h, d, w)"))
		}
		v, ok := parseUint(intPart)
		if !ok || v > (1<<63)/unit {
			return 0, durationError(orig, errOverflow)
		}
		v *= unit
		// Fraction: scale digit by digit, dropping digits beyond nanosecond
		// precision the way time.ParseDuration does (truncation).
		if fracPart != "" {
			var f uint64
			scale := 1.0
			for k := 0; k < len(fracPart); k++ {
				if f > (1<<63-1)/10 {
					break // further digits cannot change the result
				}
				y := f*10 + uint64(fracPart[k]-'0')
				if y > 1<<63 {
					break
				}
				f = y
				scale *= 10
			}
			// float64 keeps nanosecond accuracy for fractions of the
			// largest unit, as in time.ParseDuration.
			v += uint64(float64(f) * (float64(unit) / scale))
			if v > 1<<63 {
				return 0, durationError(orig, errOverflow)
			}
		}
		total += v
		if total > 1<<63 {
			return 0, durationError(orig, errOverflow)
		}
	}
	if neg {
		return -time.Duration(total), nil
	}
	if total > 1<<63-1 {
		return 0, durationError(orig, errOverflow)
	}
	return time.Duration(total), nil
}

var errOverflow = errors.New("out of range (about ±292 years)")

func parseUint(s string) (uint64, bool) {
	if s == "" {
		return 0, true
	}
	v, err := strconv.ParseUint(s, 10, 64)
	return v, err == nil
}

func durationError(s string, err error) error {
	return &FieldError{Value: s, Err: ErrDuration, Detail: err.Error()}
}

// FormatDuration writes d the way a configuration file would: whole days as
// "30d", anything else as time.Duration.String ("1h0m0s" becomes "1h",
// trailing zero units are trimmed). ParseDuration(FormatDuration(d)) == d.
func FormatDuration(d time.Duration) string {
	if d != 0 && d%Day == 0 {
		return strconv.FormatInt(int64(d/Day), 10) + "d"
	}
	s := d.String()
	if strings.HasSuffix(s, "m0s") {
		s = s[:len(s)-2]
	}
	if strings.HasSuffix(s, "h0m") {
		s = s[:len(s)-2]
	}
	return s
}
