package ingest_test

import (
	"errors"
	"fmt"
	"math"
	"math/big"
	"math/rand/v2"
	"regexp"
	"strings"
	"testing"
	"time"

	"driftfit/ingest"
)

// refRFC3339 parses s with the Go standard library, the independent
// reference. time.Parse wants upper-case 'T' and 'Z'; RFC 3339 section 5.6
// allows lower case, so the reference sees the upper-case spelling.
func refRFC3339(s string) (int64, bool) {
	b := []byte(s)
	if len(b) > 10 && b[10] == 't' {
		b[10] = 'T'
	}
	if n := len(b); n > 0 && b[n-1] == 'z' {
		b[n-1] = 'Z'
	}
	t, err := time.Parse(time.RFC3339Nano, string(b))
	if err != nil {
		return 0, false
	}
	// UnixNano is undefined outside the int64 range: check it in big
	// arithmetic first.
	ns := new(big.Int).Mul(big.NewInt(t.Unix()), big.NewInt(1e9))
	ns.Add(ns, big.NewInt(int64(t.Nanosecond())))
	if !ns.IsInt64() {
		return 0, false
	}
	return t.UnixNano(), true
}

// unixNumber is the grammar ParseTime documents for numeric times.
var unixNumber = regexp.MustCompile(`^[+-]?[0-9]+(\.[0-9]+)?([eE][+-]?[0-9]+)?$`)

// refUnixSeconds converts decimal seconds to nanoseconds with exact
// rational arithmetic from math/big, independent of the parser under test.
// ok is false when the value is not a whole number of nanoseconds (exact
// false) or does not fit in int64.
func refUnixSeconds(s string) (ns int64, exact, fits bool) {
	// big.Rat would materialise 10^exp; decide huge exponents by hand.
	if m := unixNumber.FindStringSubmatch(s); len(strings.TrimLeft(m[2], "eE+-0")) > 4 {
		mantissa, _, _ := strings.Cut(s, m[2])
		if strings.Trim(mantissa, "+-0.") == "" {
			return 0, true, true
		}
		return 0, m[2][1] != '-', false
	}
	r, ok := new(big.Rat).SetString(strings.TrimPrefix(s, "+"))
	if !ok {
		panic("big.Rat rejected " + s)
	}
	r.Mul(r, big.NewRat(1e9, 1))
	if !r.IsInt() {
		return 0, false, false
	}
	if !r.Num().IsInt64() {
		return 0, true, false
	}
	return r.Num().Int64(), true, true
}

func TestParseTime(t *testing.T) {
	// Expected values come from time.Date in the standard library, an
	// implementation independent of ParseTime.
	date := func(y int, mo time.Month, d, h, mi, s, ns int, off int) int64 {
		return time.Date(y, mo, d, h, mi, s, ns, time.FixedZone("", off)).UnixNano()
	}
	tests := []struct {
		name string
		in   string
		want int64
		err  error
	}{
		{"rfc3339 utc", "2026-03-01T12:00:00Z", date(2026, 3, 1, 12, 0, 0, 0, 0), nil},
		{"rfc3339 lower case", "2026-03-01t12:00:00z", date(2026, 3, 1, 12, 0, 0, 0, 0), nil},
		{"rfc3339 one fraction digit", "2026-03-01T12:00:00.5Z", date(2026, 3, 1, 12, 0, 0, 5e8, 0), nil},
		{"rfc3339 nine fraction digits", "2026-03-01T12:00:00.123456789Z", date(2026, 3, 1, 12, 0, 0, 123456789, 0), nil},
		{"rfc3339 positive offset", "2026-03-01T12:00:00+01:00", date(2026, 3, 1, 12, 0, 0, 0, 3600), nil},
		{"rfc3339 negative offset", "2026-03-01T12:00:00.25-05:30", date(2026, 3, 1, 12, 0, 0, 25e7, -(5*3600 + 30*60)), nil},
		{"rfc3339 unknown local offset", "2026-03-01T12:00:00-00:00", date(2026, 3, 1, 12, 0, 0, 0, 0), nil},
		{"rfc3339 leap day", "2024-02-29T23:59:59.999999999Z", date(2024, 2, 29, 23, 59, 59, 999999999, 0), nil},
		{"rfc3339 epoch", "1970-01-01T00:00:00Z", 0, nil},
		{"rfc3339 before epoch", "1969-12-31T23:59:59.9Z", -1e8, nil},
		{"rfc3339 newest representable", "2262-04-11T23:47:16.854775807Z", math.MaxInt64, nil},
		{"rfc3339 oldest representable", "1677-09-21T00:12:43.145224192Z", math.MinInt64, nil},
		{"rfc3339 one ns too late", "2262-04-11T23:47:16.854775808Z", 0, ingest.ErrTimeRange},
		{"rfc3339 one ns too early", "1677-09-21T00:12:43.145224191Z", 0, ingest.ErrTimeRange},
		{"rfc3339 year 9999", "9999-12-31T23:59:59Z", 0, ingest.ErrTimeRange},
		{"rfc3339 year 0000", "0000-01-01T00:00:00Z", 0, ingest.ErrTimeRange},
		{"rfc3339 ten fraction digits", "2026-03-01T12:00:00.1234567891Z", 0, ingest.ErrTimeSyntax},
		{"rfc3339 empty fraction", "2026-03-01T12:00:00.Z", 0, ingest.ErrTimeSyntax},
		{"rfc3339 comma fraction", "2026-03-01T12:00:00,5Z", 0, ingest.ErrTimeSyntax},
		{"rfc3339 no zone", "2026-03-01T12:00:00", 0, ingest.ErrTimeSyntax},
		{"rfc3339 space separator", "2026-03-01 12:00:00Z", 0, ingest.ErrTimeSyntax},
		{"rfc3339 feb 29 non-leap", "2026-02-29T12:00:00Z", 0, ingest.ErrTimeSyntax},
		{"rfc3339 feb 29 century", "1900-02-29T12:00:00Z", 0, ingest.ErrTimeSyntax},
		{"rfc3339 month 13", "2026-13-01T12:00:00Z", 0, ingest.ErrTimeSyntax},
		{"rfc3339 hour 24", "2026-03-01T24:00:00Z", 0, ingest.ErrTimeSyntax},
		{"rfc3339 leap second", "2016-12-31T23:59:60Z", 0, ingest.ErrTimeSyntax},
		{"rfc3339 offset hour 24", "2026-03-01T12:00:00+24:00", 0, ingest.ErrTimeSyntax},
		{"rfc3339 short offset", "2026-03-01T12:00:00+0100", 0, ingest.ErrTimeSyntax},
		{"rfc3339 trailing byte", "2026-03-01T12:00:00Zx", 0, ingest.ErrTimeSyntax},
		{"rfc3339 one-digit hour", "2026-03-01T1:00:00Z", 0, ingest.ErrTimeSyntax},
		// 1767225600 s is 2026-01-01T00:00:00Z (checked by time.Date).
		{"unix integer", "1767225600", date(2026, 1, 1, 0, 0, 0, 0, 0), nil},
		{"unix plus sign", "+1767225600", date(2026, 1, 1, 0, 0, 0, 0, 0), nil},
		{"unix fraction", "1767225600.123456789", date(2026, 1, 1, 0, 0, 0, 123456789, 0), nil},
		{"unix fraction trailing zeros", "1767225600.500000000000", date(2026, 1, 1, 0, 0, 0, 5e8, 0), nil},
		{"unix exponent", "1.7672256e9", date(2026, 1, 1, 0, 0, 0, 0, 0), nil},
		{"unix exponent upper case", "17672256E+2", date(2026, 1, 1, 0, 0, 0, 0, 0), nil},
		{"unix short exponent negative", "123e-1", 123e8, nil},
		{"unix zeros exponent", "000E-0", 0, nil},
		{"unix exponent negative", "1767225600500e-3", date(2026, 1, 1, 0, 0, 0, 5e8, 0), nil},
		{"unix nanosecond by exponent", "1e-9", 1, nil},
		{"unix negative", "-1.5", -15e8, nil},
		{"unix zero", "0", 0, nil},
		{"unix negative zero", "-0.0", 0, nil},
		{"unix zero huge exponent", "0e999999999999", 0, nil},
		{"unix max", "9223372036.854775807", math.MaxInt64, nil},
		{"unix min", "-9223372036.854775808", math.MinInt64, nil},
		{"unix max plus one ns", "9223372036.854775808", 0, ingest.ErrTimeRange},
		{"unix min minus one ns", "-9223372036.854775809", 0, ingest.ErrTimeRange},
		{"unix huge", "1e300", 0, ingest.ErrTimeRange},
		{"unix many digits", "123456789012345678901234567890", 0, ingest.ErrTimeRange},
		{"unix ten fraction digits", "1767225600.1234567891", 0, ingest.ErrTimePrecision},
		{"unix exponent below ns", "1.7672256001e-1", 0, ingest.ErrTimePrecision},
		{"unix tiny", "1e-300", 0, ingest.ErrTimePrecision},
		{"unix long fraction", "0.0000000000000000000000001", 0, ingest.ErrTimePrecision},
		{"empty", "", 0, ingest.ErrTimeSyntax},
		{"sign only", "-", 0, ingest.ErrTimeSyntax},
		{"leading dot", ".5", 0, ingest.ErrTimeSyntax},
		{"trailing dot", "5.", 0, ingest.ErrTimeSyntax},
		{"empty exponent", "5e", 0, ingest.ErrTimeSyntax},
		{"hex", "0x10", 0, ingest.ErrTimeSyntax},
		{"inf", "inf", 0, ingest.ErrTimeSyntax},
		{"inner space", "17672 25600", 0, ingest.ErrTimeSyntax},
		{"duration", "10s", 0, ingest.ErrTimeSyntax},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := ingest.ParseTime([]byte(tt.in))
			if tt.err != nil {
				var te *ingest.TimeError
				if !errors.Is(err, tt.err) || !errors.As(err, &te) || te.Value != tt.in {
					t.Fatalf("ParseTime(%q) = %d, %v; want *TimeError wrapping %v", tt.in, got, err, tt.err)
				}
				return
			}
			if err != nil || got != tt.want {
				t.Fatalf("ParseTime(%q) = %d, %v; want %d", tt.in, got, err, tt.want)
			}
			// Second, independent reference for each form.
			if unixNumber.MatchString(tt.in) {
				if ref, exact, fits := refUnixSeconds(tt.in); !exact || !fits || ref != got {
					t.Errorf("big.Rat reference for %q = %d (exact %v fits %v), ParseTime = %d", tt.in, ref, exact, fits, got)
				}
			} else if ref, ok := refRFC3339(tt.in); !ok || ref != got {
				t.Errorf("time.Parse reference for %q = %d (ok %v), ParseTime = %d", tt.in, ref, ok, got)
			}
		})
	}
}

func TestParseTime_ErrorValueBounded(t *testing.T) {
	in := strings.Repeat("9", 1000) + "x"
	_, err := ingest.ParseTime([]byte(in))
	var te *ingest.TimeError
	if !errors.As(err, &te) || len(te.Value) > 70 || !strings.HasPrefix(in, strings.TrimSuffix(te.Value, "...")) {
		t.Fatalf("ParseTime(1001 bytes) error = %v; want a *TimeError with a value cut to about 64 bytes", err)
	}
}

func TestParseTime_Random(t *testing.T) {
	rng := newRand(t)
	for i := range 200000 {
		ns := int64(rng.Uint64())
		if i%2 == 0 { // concentrate half of the cases on this century
			ns = int64(rng.Uint64N(uint64(150*365*86400e9))) - 50*365*86400e9
		}
		tm := time.Unix(0, ns)
		// RFC 3339 with a random whole-minute offset and random case.
		off := (rng.IntN(24*60*2-1) - (24*60 - 1)) * 60
		s := tm.In(time.FixedZone("", off)).Format(time.RFC3339Nano)
		if rng.IntN(2) == 0 {
			s = strings.Replace(s, "T", "t", 1)
			s = strings.Replace(s, "Z", "z", 1)
		}
		got, err := ingest.ParseTime([]byte(s))
		if err != nil || got != ns {
			ref, ok := refRFC3339(s)
			t.Fatalf("ParseTime(%q) = %d, %v; want %d (time.Parse: %d %v)", s, got, err, ns, ref, ok)
		}
		// Unix seconds, written through big.Rat in a random notation.
		num := formatSeconds(rng, ns)
		got, err = ingest.ParseTime([]byte(num))
		if err != nil || got != ns {
			t.Fatalf("ParseTime(%q) = %d, %v; want %d", num, got, err, ns)
		}
	}
}

// formatSeconds writes ns as decimal seconds: fixed with 9 decimals, with
// trailing zeros trimmed, or in exponent form with a random exponent.
func formatSeconds(rng *rand.Rand, ns int64) string {
	r := new(big.Rat).SetFrac(big.NewInt(ns), big.NewInt(1e9))
	s := r.FloatString(9)
	switch rng.IntN(3) {
	case 0:
		return s
	case 1:
		if strings.Contains(s, ".") {
			s = strings.TrimRight(strings.TrimRight(s, "0"), ".")
		}
		return s
	}
	// d.ddd...e±x form: move the point by a random amount, keeping all
	// digits so the value stays exact.
	neg := strings.HasPrefix(s, "-")
	s = strings.TrimPrefix(s, "-")
	intPart, frac, _ := strings.Cut(s, ".")
	digits := intPart + frac
	shift := rng.IntN(len(digits)) // point after `shift` digits (0 = before first)
	exp := len(intPart) - shift
	m := digits[:shift]
	if m == "" {
		m = "0"
	}
	if rest := digits[shift:]; rest != "" {
		m += "." + rest
	}
	out := fmt.Sprintf("%se%d", m, exp)
	if neg {
		out = "-" + out
	}
	return out
}

func TestParseTime_NoAllocs(t *testing.T) {
	for _, in := range []string{"2026-03-01T12:00:00.123456789+01:00", "1767225600.5", "1.7672256e9"} {
		b := []byte(in)
		allocs := testing.AllocsPerRun(100, func() {
			if _, err := ingest.ParseTime(b); err != nil {
				t.Fatal(err)
			}
		})
		if allocs != 0 {
			t.Errorf("ParseTime(%q) allocates %v times per call, want 0", in, allocs)
		}
	}
}

func FuzzParseTime(f *testing.F) {
	for _, s := range []string{
		"2026-03-01T12:00:00Z", "2026-03-01t12:00:00.123456789z", "2026-03-01T12:00:00+01:00",
		"1969-12-31T23:59:59.999999999-23:59", "2262-04-11T23:47:16.854775807Z",
		"1767225600", "1767225600.123456789", "1.7672256e9", "-9223372036.854775808", "0e5", "+1E-9",
	} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		got, err := ingest.ParseTime([]byte(s))
		if err != nil {
			var te *ingest.TimeError
			if !errors.As(err, &te) {
				t.Fatalf("ParseTime(%q) error %v is not a *TimeError", s, err)
			}
		}
		if unixNumber.MatchString(s) {
			ref, exact, fits := refUnixSeconds(s)
			switch {
			case !exact:
				if !errors.Is(err, ingest.ErrTimePrecision) {
					t.Fatalf("ParseTime(%q) = %d, %v; want ErrTimePrecision", s, got, err)
				}
			case !fits:
				if !errors.Is(err, ingest.ErrTimeRange) {
					t.Fatalf("ParseTime(%q) = %d, %v; want ErrTimeRange", s, got, err)
				}
			case err != nil || got != ref:
				t.Fatalf("ParseTime(%q) = %d, %v; big.Rat says %d", s, got, err, ref)
			}
			return
		}
		ref, ok := refRFC3339(s)
		if err == nil && (!ok || got != ref) {
			t.Fatalf("ParseTime(%q) = %d; time.Parse gives %d (ok %v)", s, got, ref, ok)
		}
	})
}

func BenchmarkParseTime(b *testing.B) {
	for _, in := range []string{"2026-03-01T12:00:00.123456789Z", "1767225600.5", "1.7672256e9"} {
		buf := []byte(in)
		b.Run(in, func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				if _, err := ingest.ParseTime(buf); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
