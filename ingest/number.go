package ingest

import (
	"errors"
	"math"
	"math/bits"
	"strconv"
	"unsafe"
)

// parseFloat parses b with strconv.ParseFloat semantics and demands a
// finite result. The string view of b avoids a copy per row; no part of
// the strconv error, which would alias b, is kept.
func parseFloat(b []byte) (float64, error) {
	if len(b) == 0 {
		return 0, ErrEmptyField
	}
	if v, ok := parseFloatFast(b); ok {
		return v, nil
	}
	v, err := strconv.ParseFloat(unsafe.String(unsafe.SliceData(b), len(b)), 64)
	if err != nil {
		if errors.Is(err, strconv.ErrRange) && math.IsInf(v, 0) {
			return 0, ErrNonFinite
		}
		return 0, ErrNumberSyntax
	}
	if math.IsInf(v, 0) || math.IsNaN(v) {
		return 0, ErrNonFinite
	}
	// strconv rounds a magnitude below the smallest subnormal
	// (4.9e-324) to zero without an error; a reading of 1e-400 is not
	// a reading of 0.
	if v == 0 && nonZeroMantissa(b) {
		return 0, ErrNumberRange
	}
	return v, nil
}

// nonZeroMantissa reports whether a non-zero digit comes before the
// exponent of a number strconv.ParseFloat accepted (decimal, or hex with
// a 0x prefix and a p exponent).
func nonZeroMantissa(b []byte) bool {
	if len(b) > 0 && (b[0] == '-' || b[0] == '+') {
		b = b[1:]
	}
	hex := len(b) > 1 && b[0] == '0' && (b[1] == 'x' || b[1] == 'X')
	if hex {
		b = b[2:]
	}
	for _, c := range b {
		switch {
		case !hex && (c == 'e' || c == 'E'), hex && (c == 'p' || c == 'P'):
			return false
		case c >= '1' && c <= '9', hex && (c >= 'a' && c <= 'f' || c >= 'A' && c <= 'F'):
			return true
		}
	}
	return false
}

// float64pow10 holds the powers of ten that float64 represents exactly.
var float64pow10 = [...]float64{1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8,
	1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20, 1e21, 1e22}

// scanDecimal reads b as [-]digits[.digits], at least one integer digit
// and, after a point, at least one fraction digit, with at most maxDigits
// digits in all (maxDigits ≤ 19, so mant cannot overflow). It returns the
// digits as one integer and the count of fraction digits; ok is false for
// any other shape.
func scanDecimal(b []byte, maxDigits int) (neg bool, mant uint64, nFrac int, ok bool) {
	i := 0
	neg = len(b) > 0 && b[0] == '-'
	if neg {
		i++
	}
	start := i
	for ; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
		mant = mant*10 + uint64(b[i]-'0')
	}
	nInt := i - start
	if i < len(b) && b[i] == '.' {
		i++
		fs := i
		for ; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
			mant = mant*10 + uint64(b[i]-'0')
		}
		if nFrac = i - fs; nFrac == 0 {
			return false, 0, 0, false
		}
	}
	// Longer inputs wrapped mant above; they are refused here.
	if i != len(b) || nInt == 0 || nInt+nFrac > maxDigits {
		return false, 0, 0, false
	}
	return neg, mant, nFrac, true
}

// parseFloatFast converts [-]digits[.digits] with at most 19 digits in
// all, correctly rounded as strconv.ParseFloat rounds, and reports false
// for every other shape. Up to 2^53 it takes Clinger's fast path (W. D.
// Clinger, "How to Read Floating Point Numbers Accurately", PLDI 1990):
// the digits as an integer and 10^k are both exact in float64, so one
// division rounds correctly. Longer mantissas, as producers print a
// float64 in full (17 digits), go through divideRound.
func parseFloatFast(b []byte) (float64, bool) {
	neg, mant, nFrac, ok := scanDecimal(b, 19)
	if !ok {
		return 0, false
	}
	return decimalFloat(neg, mant, nFrac), true
}

// decimalFloat returns ±mant/10^nFrac correctly rounded, for nFrac ≤ 19.
func decimalFloat(neg bool, mant uint64, nFrac int) float64 {
	var f float64
	if mant <= 1<<53 {
		f = float64(mant) / float64pow10[nFrac]
	} else {
		f = divideRound(mant, pow10u64[nFrac])
	}
	if neg {
		f = -f
	}
	return f
}

// pow10u64 holds 10^0 through 10^19, every power of ten below 2^64.
var pow10u64 = func() (p [20]uint64) {
	p[0] = 1
	for i := 1; i < len(p); i++ {
		p[i] = p[i-1] * 10
	}
	return p
}()

// divideRound returns n/d rounded to the nearest float64, ties to even,
// for n > 0 and d > 0. The quotient is computed exactly in integers: n is
// shifted left by s so that q = ⌊n·2^s/d⌋ has 63 or 64 bits (the shifted
// n has at most 127 bits and its high word is below d, as bits.Div64
// needs), q is cut to 53 bits and the cut bits and the remainder decide
// the rounding. The value is then m·2^(cut−s) with m < 2^53, which
// math.Ldexp scales exactly (n/d lies far inside the normal range).
func divideRound(n, d uint64) float64 {
	s := uint(63 - bits.Len64(n) + bits.Len64(d))
	var hi, lo uint64
	if s < 64 {
		hi, lo = n>>(64-s), n<<s
	} else {
		hi = n << (s - 64)
	}
	q, r := bits.Div64(hi, lo, d)
	cut := uint(bits.Len64(q) - 53)
	m, rest, half := q>>cut, q&(1<<cut-1), uint64(1)<<(cut-1)
	if rest > half || rest == half && (r != 0 || m&1 == 1) {
		m++
		if m == 1<<53 {
			m, cut = m>>1, cut+1
		}
	}
	return math.Ldexp(float64(m), int(cut)-int(s))
}
