package ingest

import (
	"math"
	"math/rand/v2"
	"strconv"
	"strings"
	"testing"
)

// TestParseFloat_FastPathMatchesStrconv checks the Clinger fast path
// against strconv.ParseFloat, the reference, bit for bit, on the short
// decimals it handles and on the shapes it must hand over.
func TestParseFloat_FastPathMatchesStrconv(t *testing.T) {
	const seed = 20260301
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 1))
	check := func(s string) {
		t.Helper()
		got, err := parseFloat([]byte(s))
		want, werr := strconv.ParseFloat(s, 64)
		finite := werr == nil && !math.IsInf(want, 0) && !math.IsNaN(want)
		if (err == nil) != finite || (finite && math.Float64bits(got) != math.Float64bits(want)) {
			t.Fatalf("parseFloat(%q) = %v, %v; strconv.ParseFloat = %v, %v", s, got, err, want, werr)
		}
	}
	for range 200000 {
		nInt, nFrac := 1+rng.IntN(16), rng.IntN(17)
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
		"+1", "NaN", "Inf", "1e999", "0x1p-2", "1_0", "123456789012345"} {
		check(s)
	}
}
