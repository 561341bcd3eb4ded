package ingest

import (
	"errors"
	"math"
	"math/big"
	"math/rand/v2"
	"strconv"
	"strings"
	"testing"
)

// checkParseFloat fails t unless parseFloat(s) is strconv.ParseFloat(s,
// 64), the reference, bit for bit, or both refuse s. A value strconv
// rounds to 0 that math/big reads exactly as non-zero (an underflow such
// as 1e-400) must be refused with ErrNumberRange.
func checkParseFloat(t *testing.T, s string) {
	t.Helper()
	got, err := parseFloat([]byte(s))
	want, werr := strconv.ParseFloat(s, 64)
	finite := werr == nil && !math.IsInf(want, 0) && !math.IsNaN(want)
	if finite && want == 0 {
		if exact, _, perr := big.ParseFloat(s, 0, 2000, big.ToNearestEven); perr == nil && exact.Sign() != 0 {
			if !errors.Is(err, ErrNumberRange) {
				t.Fatalf("parseFloat(%q) = %v, %v; want ErrNumberRange (math/big reads %v)", s, got, err, exact)
			}
			return
		}
	}
	if (err == nil) != finite || (finite && math.Float64bits(got) != math.Float64bits(want)) {
		t.Fatalf("parseFloat(%q) = %v, %v; strconv.ParseFloat = %v, %v", s, got, err, want, werr)
	}
}

// TestParseFloat_FastPathMatchesStrconv checks the fast paths against
// strconv.ParseFloat on the decimals of up to 19 digits they handle, on
// float64 values printed in full, on exact ties between two float64
// values and their neighbours, and on the shapes they must hand over.
func TestParseFloat_FastPathMatchesStrconv(t *testing.T) {
	const seed = 20260301
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 1))
	check := func(s string) { t.Helper(); checkParseFloat(t, s) }
	for range 100000 {
		// What a producer prints for a float64: 15 to 17 digits.
		v := math.Ldexp(rng.Float64()+0.5, rng.IntN(80)-20)
		check(strconv.FormatFloat(v, 'f', -1, 64))
		check(strconv.FormatFloat(-v, 'f', -1, 64))
	}
	for range 100000 {
		// Exact ties: (2m+1)/2^j with a 53-bit m has 54 significant bits,
		// halfway between two float64; its decimal form is (2m+1)·5^j with
		// j fraction digits. Both neighbours in the last digit too.
		m := 1<<52 + rng.Uint64N(1<<52)
		j := rng.IntN(4)
		n := (2*m + 1)
		for range j {
			n *= 5
		}
		if n >= 1e19-1 {
			continue
		}
		for _, k := range []uint64{n - 1, n, n + 1} {
			digits := strconv.FormatUint(k, 10)
			if j > 0 {
				digits = digits[:len(digits)-j] + "." + digits[len(digits)-j:]
			}
			check(digits)
		}
	}
	for range 200000 {
		nInt := 1 + rng.IntN(19)
		nFrac := rng.IntN(20 - nInt + 1)
		var sb strings.Builder
		if rng.IntN(2) == 0 {
			sb.WriteByte('-')
		}
		for range nInt {
			sb.WriteByte(byte('0' + rng.IntN(10)))
		}
		if nFrac > 0 {
			sb.WriteByte('.')
			for range nFrac {
				sb.WriteByte(byte('0' + rng.IntN(10)))
			}
		}
		check(sb.String())
	}
	for _, s := range []string{"0", "-0", "0.1", "9007199254740993", "999999999999999.9", "1e5", ".5", "5.", "-", "",
		"+1", "NaN", "Inf", "1e999", "0x1p-2", "1_0", "123456789012345", "9999999999999999999", "0.9999999999999999999",
		"18446744073709551615", "99999999999999999999", "0.0000000000000000001", "100.12345678901234", "9007199254740993.0",
		"1e-400", "-1e-400", "0.0e-400", "4.9e-324", "2e-324", "0x1p-1200", "0xep-2000", "0e5"} {
		check(s)
	}
}

// FuzzParseFloat checks parseFloat against strconv.ParseFloat on any
// input.
func FuzzParseFloat(f *testing.F) {
	for _, s := range []string{"0", "-12.5", "100.12345678901234", "9007199254740993", "1e5", "0.30000000000000004"} {
		f.Add(s)
	}
	f.Fuzz(checkParseFloat)
}
