package configs

import (
	"errors"
	"math"
	"math/rand/v2"
	"path"
	"strings"
	"testing"
	"time"
)

func TestQuantity_Canonical(t *testing.T) {
	kPa := Span{Lower: 0, Upper: 1000}
	tests := []struct {
		in    string
		power int
		unit  string
		span  Span
		want  float64
	}{
		// Plain quantities.
		{"0.5 kPa", 0, "kPa", kPa, 0.5},
		{"0.5kPa", 0, "kPa", kPa, 0.5},
		// 0.25 % of (1000 - 0) = 2.5 kPa.
		{"0.25 %span", 0, "kPa", kPa, 2.5},
		// 0.25 % of (150 - (-50)) = 0.25/100 × 200 = 0.5 degC.
		{"0.25 %span", 0, "degC", Span{-50, 150}, 0.5},
		{"3 %LEL", 0, "%LEL", Span{0, 100}, 3},
		{"2 mm/s", 0, "mm/s", Span{0, 25}, 2},
		{"1e-1 kPa", 0, "kPa", kPa, 0.1},
		// Slopes, to unit per day.
		{"0.2 kPa/day", 1, "kPa", kPa, 0.2},
		{"0.2 kPa/d", 1, "kPa", kPa, 0.2},
		// 0.01 kPa per hour × 24 h/day = 0.24 kPa/day.
		{"0.01 kPa/h", 1, "kPa", kPa, 0.24},
		// 1e-4 kPa per minute × 1440 min/day = 0.144 kPa/day.
		{"1e-4 kPa/min", 1, "kPa", kPa, 0.144},
		// 1e-6 kPa per second × 86400 s/day = 0.0864 kPa/day.
		{"1e-6 kPa/s", 1, "kPa", kPa, 0.0864},
		// 0.7 kPa per week / 7 days = 0.1 kPa/day.
		{"0.7 kPa/week", 1, "kPa", kPa, 0.1},
		// 0.05 % of 1000 kPa = 0.5 kPa per month; a mean Gregorian month is
		// 365.2425/12 = 30.436875 days: 0.5/30.436875 = 0.016427...
		{"0.05 %span/month", 1, "kPa", kPa, 0.5 / 30.436875},
		// 1 degC per mean Gregorian year of 365.2425 days.
		{"1 degC/year", 1, "degC", Span{0, 400}, 1 / 365.2425},
		// Units with a slash of their own: the last slash starts the time.
		// 0.3 mm/s per month = 0.3/30.436875 mm/s per day.
		{"0.3 mm/s/month", 1, "mm/s", Span{0, 25}, 0.3 / 30.436875},
		{"1.5 m3/h/month", 1, "m3/h", Span{0, 400}, 1.5 / 30.436875},
		// Curvature, to unit per day².
		{"0.01 kPa/day^2", 2, "kPa", kPa, 0.01},
		{"0.01 kPa/d²", 2, "kPa", kPa, 0.01},
		// 1e-4 kPa per h² × (24 h/day)² = 1e-4 × 576 = 0.0576 kPa/day².
		{"1e-4 kPa/h^2", 2, "kPa", kPa, 0.0576},
		// 0.49 kPa per week² / 7² = 0.01 kPa/day².
		{"0.49 kPa/week^2", 2, "kPa", kPa, 0.01},
		// 1 % of 1000 = 10 kPa per month², / 30.436875² days².
		{"1 %span/month^2", 2, "kPa", kPa, 10 / (30.436875 * 30.436875)},
	}
	for _, tc := range tests {
		t.Run(tc.in, func(t *testing.T) {
			q, err := parseQuantity(tc.in, tc.power)
			if err != nil {
				t.Fatalf("parseQuantity(%q, %d) = %v", tc.in, tc.power, err)
			}
			got, err := q.canonical(tc.unit, tc.span)
			if err != nil {
				t.Fatalf("canonical(%q) = %v", tc.in, err)
			}
			if math.Abs(got-tc.want) > 1e-14*math.Abs(tc.want) {
				t.Errorf("canonical(%q) = %.17g, want %.17g", tc.in, got, tc.want)
			}
		})
	}
}

func TestQuantity_Errors(t *testing.T) {
	tests := []struct {
		in    string
		power int
		unit  string
		want  error
		text  string
	}{
		{"kPa", 0, "kPa", ErrUnit, "expected a number first"},
		{"0.5", 0, "kPa", ErrUnit, "missing unit"},
		{"inf kPa", 0, "kPa", ErrUnit, "expected a number first"},
		{"1e999 kPa", 0, "kPa", ErrUnit, "out of range"},
		{"0.2 kPa", 1, "kPa", ErrUnit, "needs a time unit"},
		{"0.2 kPa/fortnight", 1, "kPa", ErrUnit, `unknown time unit "fortnight"`},
		{"0.2 kPa/days", 1, "kPa", ErrUnit, `unknown time unit "days"`},
		{"0.2 /day", 1, "kPa", ErrUnit, "missing unit before"},
		{"0.2 kPa/day^2", 1, "kPa", ErrUnit, "not per time squared"},
		{"0.2 kPa/day", 2, "kPa", ErrUnit, "per time squared"},
		{"0.2 k Pa", 0, "kPa", ErrUnit, "white space"},
		{"0.2 degC/day", 1, "kPa", ErrUnitMismatch, `unit "degC", class unit "kPa"`},
		// A velocity unit is not a slope of mm: the class unit decides.
		{"2 mm/s", 0, "mm", ErrUnitMismatch, `unit "mm/s"`},
	}
	for _, tc := range tests {
		t.Run(tc.in, func(t *testing.T) {
			q, err := parseQuantity(tc.in, tc.power)
			if err == nil {
				_, err = q.canonical(tc.unit, Span{0, 100})
			}
			if !errors.Is(err, tc.want) || !strings.Contains(err.Error(), tc.text) {
				t.Errorf("quantity %q (power %d, unit %s) error = %v, want %v containing %q", tc.in, tc.power, tc.unit, err, tc.want, tc.text)
			}
		})
	}
}

// Go-syntax durations must parse exactly as time.ParseDuration, the
// reference implementation; d and w are 24 h and 168 h.
func TestParseDuration(t *testing.T) {
	for _, s := range []string{"0", "1ns", "1.5us", "2µs", "3μs", "200ms", "90s", "5m", "1h30m", "-1.5h", "+2h",
		".5s", "5.s", "1h0.000000001s", "2562047h47m16.854775807s", "-2562047h47m16.854775808s",
		"0.123456789123s", "1.0000000000000000000000001h", "100000000000000000000h", "", "1", "h", ".", "1hh", "1.h.5s", "--1s"} {
		want, wantErr := time.ParseDuration(s)
		got, err := ParseDuration(s)
		if (err != nil) != (wantErr != nil) || got != want {
			t.Errorf("ParseDuration(%q) = %v, %v; time.ParseDuration = %v, %v", s, got, err, want, wantErr)
		}
		if err != nil && !errors.Is(err, ErrDuration) {
			t.Errorf("ParseDuration(%q) error %v does not wrap ErrDuration", s, err)
		}
	}
	for _, tc := range []struct {
		in   string
		want time.Duration
	}{
		{"1d", 24 * time.Hour},
		{"400d", 400 * 24 * time.Hour},
		{"1w", 7 * 24 * time.Hour},
		// 1 w + 2 d = 9 × 24 h.
		{"1w2d", 9 * 24 * time.Hour},
		// 1.5 d = 36 h.
		{"1.5d", 36 * time.Hour},
		{"1d12h30m", 36*time.Hour + 30*time.Minute},
		{"-2d", -48 * time.Hour},
	} {
		got, err := ParseDuration(tc.in)
		if err != nil || got != tc.want {
			t.Errorf("ParseDuration(%q) = %v, %v; want %v", tc.in, got, err, tc.want)
		}
	}
	// 106752 d × 86400 s × 1e9 ns = 9.2233728e18 > 2^63 - 1 = 9.223372036854775807e18.
	if _, err := ParseDuration("106752d"); !errors.Is(err, ErrDuration) {
		t.Errorf("ParseDuration(106752d) = %v, want overflow", err)
	}
	for _, s := range []string{"5 m", "1y", "1mo", "1day"} {
		if _, err := ParseDuration(s); !errors.Is(err, ErrDuration) {
			t.Errorf("ParseDuration(%q) = %v, want ErrDuration", s, err)
		}
	}
}

func TestFormatDuration_RoundTrip(t *testing.T) {
	for _, d := range []time.Duration{0, time.Nanosecond, 200 * time.Millisecond, 90 * time.Second, time.Hour,
		25 * time.Hour, 24 * time.Hour, 400 * Day, -3 * Day, time.Hour + time.Second, math.MaxInt64, math.MinInt64} {
		s := FormatDuration(d)
		got, err := ParseDuration(s)
		if err != nil || got != d {
			t.Errorf("ParseDuration(FormatDuration(%v) = %q) = %v, %v", int64(d), s, got, err)
		}
	}
}

// FuzzParseDuration compares with time.ParseDuration on inputs without the
// d and w units, and checks the FormatDuration round trip.
func FuzzParseDuration(f *testing.F) {
	for _, s := range []string{"1h30m", "200ms", "1d", "1w2d", "-1.5h", ".5s", "0", "9223372036854775807ns", "1.0000000001d"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		got, err := ParseDuration(s)
		if !strings.ContainsAny(s, "dw \t") {
			want, wantErr := time.ParseDuration(s)
			if (err != nil) != (wantErr != nil) || got != want {
				t.Fatalf("ParseDuration(%q) = %v, %v; time.ParseDuration = %v, %v", s, got, err, want, wantErr)
			}
		}
		if err == nil {
			back, err := ParseDuration(FormatDuration(got))
			if err != nil || back != got {
				t.Fatalf("round trip of %v via %q = %v, %v", got, FormatDuration(got), back, err)
			}
		}
	})
}

// The matcher must agree with path.Match once "." plays the role of "/":
// both keep "*" and "?" within one separator-delimited element.
func TestMatchPattern_AgainstPathMatch(t *testing.T) {
	const seed = 20260101
	t.Logf("seed %d", seed)
	r := rand.New(rand.NewPCG(seed, 0))
	gen := func(alpha string, max int) string {
		b := make([]byte, r.IntN(max+1))
		for i := range b {
			b[i] = alpha[r.IntN(len(alpha))]
		}
		return string(b)
	}
	slash := func(s string) string { return strings.ReplaceAll(s, ".", "/") }
	for range 200000 {
		p := gen("ab.*?", 6)
		id := gen("ab.", 7)
		want, err := path.Match(slash(p), slash(id))
		if err != nil {
			t.Fatalf("path.Match(%q): %v", p, err)
		}
		if got := matchPattern(p, id); got != want {
			t.Fatalf("matchPattern(%q, %q) = %v, path.Match says %v", p, id, got, want)
		}
	}
	// Realistic ids.
	for _, tc := range []struct {
		p, id string
		want  bool
	}{
		{"plantA.boiler*.pt-*", "plantA.boiler2.pt-101", true},
		{"plantA.boiler*.pt-*", "plantA.boiler2.tt-101", false},
		{"plantA.boiler*.pt-*", "plantA.boiler2.x.pt-101", false},
		{"qm.*.*.pt-*", "qm.u1.steam.pt-101", true},
		{"qm.u1.furnace.te-30?", "qm.u1.furnace.te-310", false},
	} {
		if got := matchPattern(tc.p, tc.id); got != tc.want {
			t.Errorf("matchPattern(%q, %q) = %v, want %v", tc.p, tc.id, got, tc.want)
		}
	}
}

// overlap must answer exactly "is there an id matching both", checked by
// enumerating every id over {a, b, .} up to length 6: patterns of at most 3
// characters each have a common id of at most 3+3 characters if any,
// since each character of a shortest common id consumes at least one
// pattern character.
func TestOverlap_AgainstBruteForce(t *testing.T) {
	const seed = 7
	t.Logf("seed %d", seed)
	r := rand.New(rand.NewPCG(seed, 0))
	var ids []string
	var grow func(prefix string)
	grow = func(prefix string) {
		ids = append(ids, prefix)
		if len(prefix) == 6 {
			return
		}
		for _, c := range "ab." {
			grow(prefix + string(c))
		}
	}
	grow("")
	gen := func() string {
		b := make([]byte, r.IntN(4))
		for i := range b {
			b[i] = "ab.*?"[r.IntN(5)]
		}
		return string(b)
	}
	slash := func(s string) string { return strings.ReplaceAll(s, ".", "/") }
	both := func(p, q, id string) bool {
		a, _ := path.Match(slash(p), slash(id))
		b, _ := path.Match(slash(q), slash(id))
		return a && b
	}
	for range 1500 {
		p, q := gen(), gen()
		want := false
		for _, id := range ids {
			if both(p, q, id) {
				want = true
				break
			}
		}
		w, got := overlap(p, q)
		if got != want {
			t.Fatalf("overlap(%q, %q) = %v, brute force says %v", p, q, got, want)
		}
		if got && !both(p, q, w) {
			t.Fatalf("overlap(%q, %q) witness %q does not match both", p, q, w)
		}
	}
	for _, tc := range []struct {
		a, b string
		want bool
	}{
		{"qm.*.*.pt-*", "qm.*.*.tt-*", false},
		{"plantA.boiler*.pt-*", "plantA.boiler?.*", true},
		{"qm.u1.furnace.te-30?", "qm.u1.furnace.te-31?", false},
		{"a.*", "a.b.c", false},
	} {
		if _, got := overlap(tc.a, tc.b); got != tc.want {
			t.Errorf("overlap(%q, %q) = %v, want %v", tc.a, tc.b, got, tc.want)
		}
	}
}

func TestParent(t *testing.T) {
	for in, want := range map[string]string{
		"classes[1].limits.slope":       "classes[1].limits",
		"classes[1]":                    "classes",
		"sensors[qm.u1.pt-101].as_left": "sensors[qm.u1.pt-101]",
		"sensors[qm.u1.pt-101]":         "sensors",
		"bus":                           "",
		"sensors[a.b].windows[0].span":  "sensors[a.b].windows[0]",
		"sensors[a.b].windows[0]":       "sensors[a.b].windows",
	} {
		if got := parent(in); got != want {
			t.Errorf("parent(%q) = %q, want %q", in, got, want)
		}
	}
}

func TestRedactURL(t *testing.T) {
	for in, want := range map[string]string{
		"nats://u:secret@h:4222": "nats://u:xxxxx@h:4222",
		"nats://u@h:4222":        "nats://u@h:4222",
		"nats://h:4222/x@y":      "nats://h:4222/x@y",
		"tls://a:b:c@h":          "tls://a:xxxxx@h",
		"not a url :// u:p@ h":   "not a url :// u:xxxxx@ h",
		"nats://u:p%zz@h":        "nats://u:xxxxx@h",
	} {
		if got := redactURL(in); got != want {
			t.Errorf("redactURL(%q) = %q, want %q", in, got, want)
		}
	}
}
