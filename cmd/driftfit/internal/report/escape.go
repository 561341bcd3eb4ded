package report

import (
	"strconv"
	"strings"
	"unicode/utf8"
)

// EscapeID returns a sensor id fit for a terminal: control characters,
// terminal escape codes, invisible and other non-printing runes and bytes
// that are not UTF-8 are written as Go escapes (\x1b, \t, \u200b, \xff),
// and a backslash as \\, so an id can neither move the cursor nor pass
// for another. Printable ids come back unchanged.
func EscapeID(id string) string {
	plain := true
	for i := 0; i < len(id); i++ {
		if c := id[i]; c < 0x20 || c >= 0x7f || c == '\\' {
			plain = false
			break
		}
	}
	if plain {
		return id
	}
	var b strings.Builder
	for i := 0; i < len(id); {
		r, size := utf8.DecodeRuneInString(id[i:])
		switch {
		case r == utf8.RuneError && size == 1:
			b.WriteString(`\x`)
			b.WriteString(strconv.FormatUint(uint64(id[i])>>4, 16))
			b.WriteString(strconv.FormatUint(uint64(id[i])&0xf, 16))
		case r == '\\':
			b.WriteString(`\\`)
		case strconv.IsPrint(r):
			b.WriteRune(r)
		default:
			q := strconv.QuoteRuneToASCII(r) // '\x1b', '\u200b'
			b.WriteString(q[1 : len(q)-1])
		}
		i += size
	}
	return b.String()
}
