package ingest

import (
	"errors"
	"math"
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
	return v, nil
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

// parseFloatFast converts [-]digits[.digits] with at most 15 digits in all
// by Clinger's fast path (W. D. Clinger, "How to Read Floating Point
// Numbers Accurately", PLDI 1990): the digits as an integer and 10^k are
// both exact in float64, so one division rounds correctly, exactly as
// strconv.ParseFloat would. It reports false for every other shape.
func parseFloatFast(b []byte) (float64, bool) {
	neg, mant, nFrac, ok := scanDecimal(b, 15)
	if !ok {
		return 0, false
	}
	f := float64(mant) / float64pow10[nFrac]
	if neg {
		f = -f
	}
	return f, true
}
