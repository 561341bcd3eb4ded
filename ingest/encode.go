package ingest

import (
	"math"
	"strconv"

	"driftfit/rolling"
)

// AppendReading appends d as a single-reading payload that Decoder reads
// back bit for bit: {"t":<Unix seconds>,"v":...,"ref":...,"unit":"..."},
// with ref only when HasRef and unit only when non-empty. It takes a
// Decoded rather than a rolling.Reading so that everything Decode returns
// can be sent again (wrap a plain reading as Decoded{Reading: r}).
//
// The time is written as exact decimal seconds and numbers in the
// shortest form that round-trips. A non-finite value, which a Reading must
// not hold, is written as 1e999, -1e999 or null (NaN): valid JSON that
// Decode rejects as non-finite or missing, so a test feed can produce such
// readings on purpose.
func AppendReading(dst []byte, d Decoded) []byte {
	dst = append(dst, `{"t":`...)
	dst = appendUnixSeconds(dst, d.UnixNano)
	dst = append(dst, `,"v":`...)
	dst = appendNumber(dst, d.Value)
	if d.HasRef {
		dst = append(dst, `,"ref":`...)
		dst = appendNumber(dst, d.Ref)
	}
	if len(d.Unit) > 0 {
		dst = append(dst, `,"unit":`...)
		dst = appendString(dst, d.Unit)
	}
	return append(dst, '}')
}

// AppendBatch appends rs as a batch payload for one sensor:
// {"sensor":"...","t":[...],"v":[...]}, the most compact shape Decoder
// reads. Times and values are written as by AppendReading.
func AppendBatch(dst []byte, sensor string, rs []rolling.Reading) []byte {
	dst = append(dst, `{"sensor":`...)
	dst = appendString(dst, sensor)
	dst = append(dst, `,"t":[`...)
	for i, r := range rs {
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = appendUnixSeconds(dst, r.UnixNano)
	}
	dst = append(dst, `],"v":[`...)
	for i, r := range rs {
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = appendNumber(dst, r.Value)
	}
	return append(dst, "]}"...)
}

// appendUnixSeconds writes ns as decimal seconds with at most 9 decimals
// and no trailing zeros, which ParseTime reads back exactly.
func appendUnixSeconds(dst []byte, ns int64) []byte {
	u := uint64(ns)
	if ns < 0 {
		dst = append(dst, '-')
		u = -u // two's complement; right for math.MinInt64 too
	}
	dst = strconv.AppendUint(dst, u/1e9, 10)
	frac := u % 1e9
	if frac == 0 {
		return dst
	}
	var digits [10]byte
	digits[0] = '.'
	for i := 9; i >= 1; i-- {
		digits[i] = byte('0' + frac%10)
		frac /= 10
	}
	n := 10
	for digits[n-1] == '0' {
		n--
	}
	return append(dst, digits[:n]...)
}

func appendNumber(dst []byte, v float64) []byte {
	switch {
	case math.IsNaN(v):
		return append(dst, "null"...)
	case math.IsInf(v, 1):
		return append(dst, "1e999"...)
	case math.IsInf(v, -1):
		return append(dst, "-1e999"...)
	}
	return strconv.AppendFloat(dst, v, 'g', -1, 64)
}

// appendString writes s as a JSON string. Bytes are copied as they are
// apart from the escapes JSON requires (quote, backslash, control
// characters), so Decode returns the same bytes.
func appendString[S []byte | string](dst []byte, s S) []byte {
	const hex = "0123456789abcdef"
	dst = append(dst, '"')
	for i := 0; i < len(s); i++ {
		switch c := s[i]; {
		case c == '"' || c == '\\':
			dst = append(dst, '\\', c)
		case c < 0x20:
			dst = append(dst, '\\', 'u', '0', '0', hex[c>>4], hex[c&0xF])
		default:
			dst = append(dst, c)
		}
	}
	return append(dst, '"')
}
