package web

import (
	"fmt"
	"unicode/utf8"

	"driftfit/store"
)

// checkID accepts the ids a reading can arrive under: the tail of a NATS
// subject, dot-separated tokens, none empty, without white space, control
// bytes or the wildcards * and > (the rules configs applies to ids, plus
// the store's length limit). "?" is refused as configs refuses it.
func checkID(id string) error {
	bad := func(format string, a ...any) error {
		return &IDError{ID: id, Reason: fmt.Sprintf(format, a...)}
	}
	switch {
	case id == "":
		return bad("empty")
	case len(id) > store.MaxSensorID:
		return bad("%d bytes, longer than %d", len(id), store.MaxSensorID)
	case !utf8.ValidString(id):
		return bad("not valid UTF-8")
	}
	start := 0
	for i := 0; i < len(id); i++ {
		switch b := id[i]; {
		case b == '.':
			if i == start {
				return bad("empty token at byte %d (two dots in a row, or a leading dot)", i)
			}
			start = i + 1
		case b == ' ':
			return bad("space at byte %d", i)
		case b < 0x20 || b == 0x7f:
			return bad("control byte 0x%02x at byte %d", b, i)
		case b == '*' || b == '>' || b == '?':
			return bad("wildcard %q at byte %d", b, i)
		}
	}
	if start == len(id) {
		return bad("empty token at the end (a trailing dot)")
	}
	return nil
}
