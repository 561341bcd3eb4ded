package ingest

import (
	"math"
	"strconv"
)

// maxErrValue bounds the copy of an offending input kept in an error, so a
// hostile multi-megabyte field cannot be echoed into logs or headers.
const maxErrValue = 64

// boundedString copies at most maxErrValue bytes of b, marking a cut with
// "...". It allocates, so it is used on error paths only.
func boundedString(b []byte) string {
	if len(b) <= maxErrValue {
		return string(b)
	}
	return string(b[:maxErrValue]) + "..."
}

// TimeError reports a time that ParseTime could not turn into Unix
// nanoseconds. Err is ErrTimeSyntax, ErrTimeRange or ErrTimePrecision.
type TimeError struct {
	Value string // the offending input, cut to 64 bytes
	Err   error
}

// Error gives the cause and the quoted value.
func (e *TimeError) Error() string { return e.Err.Error() + ": " + strconv.Quote(e.Value) }

// Unwrap returns the sentinel that classifies the problem.
func (e *TimeError) Unwrap() error { return e.Err }

func timeError(b []byte, err error) error { return &TimeError{Value: boundedString(b), Err: err} }

// ParseTime returns the instant written in b as nanoseconds since the Unix
// epoch, exactly: no step goes through float64. It does not allocate unless
// it fails, and then returns a *TimeError.
//
// Two forms are accepted:
//
//   - RFC 3339 date-time: 2026-03-01T12:00:00Z, with 1 to 9 fractional
//     digits after a '.', 'Z' or a numeric offset (+01:00, -00:00), and the
//     lower-case 't' and 'z' that RFC 3339 section 5.6 allows. Leap seconds
//     (second 60) are refused because Unix time has no place for them.
//   - Unix seconds as a decimal number: optional sign, digits, optional
//     fraction and optional exponent, i.e. every JSON number
//     (1767225600, 1767225600.123456789, 1.7672256e9) plus a leading '+'.
//     A value that is not a whole number of nanoseconds is refused
//     (ErrTimePrecision) instead of being rounded.
//
// The text is read as RFC 3339 when it starts with four digits and a '-'
// (a year), which no number can; anything else is read as a number.
func ParseTime(b []byte) (int64, error) {
	if len(b) >= 5 && b[4] == '-' {
		if _, ok := digits4(b); ok {
			return parseRFC3339(b)
		}
	}
	return parseUnixSeconds(b)
}

// Bounds of int64 nanoseconds expressed in whole seconds (floor division).
const (
	minUnixSec = -9223372037 // floor(math.MinInt64 / 1e9)
	maxUnixSec = 9223372036  // floor(math.MaxInt64 / 1e9)
)

// parseRFC3339 reads the RFC 3339 "date-time" production (section 5.6):
//
//	YYYY-MM-DD ('T'|'t') hh:mm:ss ['.' 1*DIGIT] ('Z'|'z'|('+'|'-') hh:mm)
func parseRFC3339(b []byte) (int64, error) {
	if len(b) < len("2006-01-02T15:04:05Z") ||
		b[7] != '-' || (b[10] != 'T' && b[10] != 't') || b[13] != ':' || b[16] != ':' {
		return 0, timeError(b, ErrTimeSyntax)
	}
	year, ok1 := digits4(b[0:4])
	month, ok2 := digits2(b[5:7])
	day, ok3 := digits2(b[8:10])
	hour, ok4 := digits2(b[11:13])
	minute, ok5 := digits2(b[14:16])
	sec, ok6 := digits2(b[17:19])
	if !(ok1 && ok2 && ok3 && ok4 && ok5 && ok6) ||
		month < 1 || month > 12 || day < 1 || day > daysIn(year, month) ||
		hour > 23 || minute > 59 || sec > 59 {
		return 0, timeError(b, ErrTimeSyntax)
	}
	rest := b[19:]
	var frac int64
	if rest[0] == '.' {
		n := 1
		for n < len(rest) && rest[n] >= '0' && rest[n] <= '9' {
			frac = frac*10 + int64(rest[n]-'0')
			n++
		}
		digits := n - 1
		if digits == 0 || digits > 9 {
			return 0, timeError(b, ErrTimeSyntax)
		}
		frac *= pow10[9-digits]
		rest = rest[n:]
	}
	var offset int64 // seconds east of UTC
	switch {
	case len(rest) == 1 && (rest[0] == 'Z' || rest[0] == 'z'):
	case len(rest) == 6 && (rest[0] == '+' || rest[0] == '-') && rest[3] == ':':
		oh, okh := digits2(rest[1:3])
		om, okm := digits2(rest[4:6])
		if !okh || !okm || oh > 23 || om > 59 {
			return 0, timeError(b, ErrTimeSyntax)
		}
		offset = int64(oh*3600 + om*60)
		if rest[0] == '-' {
			offset = -offset
		}
	default:
		return 0, timeError(b, ErrTimeSyntax)
	}
	secs := daysFromCivil(year, month, day)*86400 +
		int64(hour*3600+minute*60+sec) - offset
	ns, ok := secondsToNanos(secs, frac)
	if !ok {
		return 0, timeError(b, ErrTimeRange)
	}
	return ns, nil
}

// secondsToNanos returns sec*1e9 + frac (0 <= frac < 1e9) and whether it
// fits in an int64.
func secondsToNanos(sec, frac int64) (int64, bool) {
	if sec < minUnixSec || sec > maxUnixSec {
		return 0, false
	}
	if sec == minUnixSec {
		// sec*1e9 alone would overflow; borrow one second from frac.
		if frac == 0 {
			return 0, false
		}
		sec++
		frac -= 1e9
	}
	ns := sec * 1e9
	if frac > 0 && ns > math.MaxInt64-frac {
		return 0, false
	}
	if frac < 0 && ns < math.MinInt64-frac {
		return 0, false
	}
	return ns + frac, true
}

func digits2(b []byte) (int, bool) {
	d0, d1 := b[0]-'0', b[1]-'0'
	return int(d0)*10 + int(d1), d0 <= 9 && d1 <= 9
}

func digits4(b []byte) (int, bool) {
	hi, ok1 := digits2(b[0:2])
	lo, ok2 := digits2(b[2:4])
	return hi*100 + lo, ok1 && ok2
}

func daysIn(year, month int) int {
	switch month {
	case 2:
		if year%4 == 0 && (year%100 != 0 || year%400 == 0) {
			return 29
		}
		return 28
	case 4, 6, 9, 11:
		return 30
	}
	return 31
}

// daysFromCivil returns the number of days from 1970-01-01 to the given
// proleptic Gregorian date. Algorithm "days_from_civil" from Howard
// Hinnant, "chrono-Compatible Low-Level Date Algorithms"
// (https://howardhinnant.github.io/date_algorithms.html).
func daysFromCivil(y, m, d int) int64 {
	if m <= 2 {
		y--
	}
	era := y / 400
	if y < 0 && y%400 != 0 {
		era-- // floor division; only reachable for year 0000
	}
	yoe := y - era*400
	mp := (m + 9) % 12
	doy := (153*mp+2)/5 + d - 1
	doe := yoe*365 + yoe/4 - yoe/100 + doy
	return int64(era)*146097 + int64(doe) - 719468
}

var pow10 = [...]int64{1, 10, 100, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10,
	1e11, 1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18}

// parseUnixSeconds reads [+-] 1*DIGIT ['.' 1*DIGIT] [('e'|'E') ['+'|'-'] 1*DIGIT]
// as Unix seconds. The significant digits are collected in a uint64 with
// the trailing zeros counted apart, so the value is mant * 10^k ns for an
// integer k; it is a whole number of nanoseconds exactly when k >= 0 (the
// last kept digit is non-zero, so mant is never divisible by 10).
func parseUnixSeconds(b []byte) (int64, error) {
	if ns, ok := parseUnixSecondsFast(b); ok {
		return ns, nil
	}
	i := 0
	neg := false
	if i < len(b) && (b[i] == '+' || b[i] == '-') {
		neg = b[i] == '-'
		i++
	}
	var (
		mant     uint64
		zeros    int  // zeros after the last non-zero digit, not yet in mant
		overflow bool // mant exceeded 2^63: the value cannot be valid
		nFrac    int
		nDigits  int
	)
	digit := func(c byte) {
		if c == '0' {
			if mant != 0 || overflow {
				zeros++
			}
			return
		}
		for ; zeros >= 0 && !overflow; zeros-- {
			if mant > (1<<63)/10 {
				overflow = true
			}
			mant *= 10
		}
		zeros = 0
		mant += uint64(c - '0')
		if mant > 1<<63 {
			overflow = true
		}
	}
	for ; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
		digit(b[i])
		nDigits++
	}
	if nDigits == 0 {
		return 0, timeError(b, ErrTimeSyntax)
	}
	if i < len(b) && b[i] == '.' {
		i++
		start := i
		for ; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
			digit(b[i])
		}
		nFrac = i - start
		if nFrac == 0 {
			return 0, timeError(b, ErrTimeSyntax)
		}
	}
	exp := 0
	if i < len(b) && (b[i] == 'e' || b[i] == 'E') {
		i++
		eneg := false
		if i < len(b) && (b[i] == '+' || b[i] == '-') {
			eneg = b[i] == '-'
			i++
		}
		start := i
		for ; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
			if exp < 1e6 { // saturate: beyond this every non-zero value fails anyway
				exp = exp*10 + int(b[i]-'0')
			}
		}
		if i == start {
			return 0, timeError(b, ErrTimeSyntax)
		}
		if eneg {
			exp = -exp
		}
	}
	if i != len(b) {
		return 0, timeError(b, ErrTimeSyntax)
	}
	if mant == 0 && !overflow {
		return 0, nil
	}
	k := zeros + exp - nFrac + 9
	if k < 0 {
		return 0, timeError(b, ErrTimePrecision)
	}
	if overflow || k >= len(pow10) {
		return 0, timeError(b, ErrTimeRange)
	}
	limit := uint64(math.MaxInt64)
	if neg {
		limit = 1 << 63
	}
	p := uint64(pow10[k])
	if mant > limit/p {
		return 0, timeError(b, ErrTimeRange)
	}
	ns := mant * p
	if neg {
		return int64(-ns), nil // two's complement: also right for ns == 2^63
	}
	return int64(ns), nil
}

// parseUnixSecondsFast handles the common shape [-]digits[.digits] with at
// most 18 digits in all, which fit a uint64 as they stand. It reports false
// for anything else, including every error, and the general parser decides.
func parseUnixSecondsFast(b []byte) (int64, bool) {
	neg, mant, nFrac, ok := scanDecimal(b, 18)
	if !ok {
		return 0, false
	}
	return decimalUnixNano(neg, mant, nFrac)
}

// decimalUnixNano returns ±mant/10^nFrac seconds in ns, for mant < 10^18;
// false when nFrac > 9 or the result leaves the int64 range.
func decimalUnixNano(neg bool, mant uint64, nFrac int) (int64, bool) {
	if nFrac > 9 {
		return 0, false
	}
	// mant < 10^18 and nFrac <= 9, so mant * 10^(9-nFrac) < 2^63 only
	// when the integer part is small enough; check before multiplying.
	p := uint64(pow10[9-nFrac])
	if mant > math.MaxInt64/p {
		return 0, false
	}
	ns := int64(mant * p)
	if neg {
		ns = -ns
	}
	return ns, true
}
