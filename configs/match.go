package configs

import (
	"fmt"
	"strings"
)

// Sensor id patterns. Ids are dot-separated tokens, like the NATS subjects
// they arrive on ("qm.u1.steam.pt-101"). In a pattern "*" matches any run of
// characters within one token (never a dot) and "?" matches exactly one
// character other than a dot; every other character matches itself. Keeping
// wildcards inside a token is what makes two patterns such as
// "qm.*.*.pt-*" and "qm.*.*.tc-*" provably disjoint; if "*" could cross dots
// almost any two patterns would overlap.
//
// These are the semantics of the standard library's path.Match with "." in
// the role of "/" and without character classes; the tests use path.Match as
// the reference.

// matchPattern reports whether id matches pattern. Since no wildcard
// matches a dot, the dots of id and pattern must pair up one to one, so the
// match is done token by token; inside a token the usual greedy star matcher
// with backtracking to the last star is exact. It does not allocate.
func matchPattern(pattern, id string) bool {
	for {
		pt, prest, pmore := strings.Cut(pattern, ".")
		it, irest, imore := strings.Cut(id, ".")
		if !matchToken(pt, it) {
			return false
		}
		if !pmore || !imore {
			return pmore == imore
		}
		pattern, id = prest, irest
	}
}

// matchToken matches one dot-free token against one dot-free pattern token.
func matchToken(pattern, s string) bool {
	p, i := 0, 0
	star, mark := -1, 0 // last star seen in pattern and where its run ends in s
	for i < len(s) {
		switch {
		case p < len(pattern) && pattern[p] == '*':
			star, mark = p, i
			p++
		case p < len(pattern) && (pattern[p] == '?' || pattern[p] == s[i]):
			p++
			i++
		case star >= 0:
			mark++
			p, i = star+1, mark
		default:
			return false
		}
	}
	for p < len(pattern) && pattern[p] == '*' {
		p++
	}
	return p == len(pattern)
}

// validatePattern checks that a pattern has no empty token and no white
// space. It returns a description of the problem or "".
func validatePattern(p string) string {
	if p == "" {
		return "empty pattern"
	}
	for _, tok := range strings.Split(p, ".") {
		if tok == "" {
			return "empty token (two dots in a row, or a leading or trailing dot)"
		}
	}
	for _, r := range p {
		if r <= ' ' || r == 0x7f || r == '>' {
			return fmt.Sprintf("character %q not allowed in a pattern", r)
		}
	}
	return ""
}

// validateID checks that a sensor id is a usable NATS subject tail: tokens
// separated by dots, none empty, no wildcards, no white space.
func validateID(id string) string {
	if d := validatePattern(id); d != "" {
		return d
	}
	if strings.ContainsAny(id, "*?") {
		return "a sensor id cannot contain the wildcards * or ?"
	}
	return ""
}

// overlap reports whether some id matches both patterns a and b, and if so
// returns one such id. Dynamic programming over positions (i, j): can a
// string matching a[i:] also match b[j:]? A star may match nothing, or take
// one unit of what the other pattern produces (a literal, a "?" or the other
// star's whole run) as long as it is not a dot. The table has
// (len(a)+1)·(len(b)+1) cells.
func overlap(a, b string) (string, bool) {
	n, m := len(a), len(b)
	// ok[i*(m+1)+j] answers the question for (i, j). Filled backwards so
	// every cell depends only on cells with larger i or j.
	ok := make([]bool, (n+1)*(m+1))
	at := func(i, j int) bool { return ok[i*(m+1)+j] }
	compat := func(x, y byte) bool {
		switch {
		case x == '?' && y == '?':
			return true
		case x == '?':
			return y != '.'
		case y == '?':
			return x != '.'
		}
		return x == y
	}
	for i := n; i >= 0; i-- {
		for j := m; j >= 0; j-- {
			var v bool
			switch {
			case i == n && j == m:
				v = true
			case i < n && a[i] == '*':
				v = at(i+1, j) || (j < m && b[j] != '.' && at(i, j+1))
			case j < m && b[j] == '*':
				v = at(i, j+1) || (i < n && a[i] != '.' && at(i+1, j))
			case i < n && j < m:
				v = compat(a[i], b[j]) && at(i+1, j+1)
			}
			ok[i*(m+1)+j] = v
		}
	}
	if !at(0, 0) {
		return "", false
	}
	// Walk one true path and spell out the characters it consumes.
	var w strings.Builder
	lit := func(x, y byte) byte {
		switch {
		case x != '?' && x != '*':
			return x
		case y != '?' && y != '*':
			return y
		}
		return 'x'
	}
	i, j := 0, 0
	for i < n || j < m {
		switch {
		case i < n && a[i] == '*':
			if at(i+1, j) {
				i++
			} else {
				if b[j] != '*' {
					w.WriteByte(lit(b[j], '?'))
				}
				j++
			}
		case j < m && b[j] == '*':
			if at(i, j+1) {
				j++
			} else {
				w.WriteByte(lit(a[i], '?'))
				i++
			}
		default:
			w.WriteByte(lit(a[i], b[j]))
			i++
			j++
		}
	}
	return w.String(), true
}
