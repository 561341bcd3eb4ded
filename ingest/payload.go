package ingest

import (
	"fmt"
	"strings"
	"unicode/utf8"

	"driftfit/rolling"
)

// DefaultMaxBytes is the payload size limit of a Decoder whose MaxBytes is
// zero: 1 MiB, the default max_payload of a NATS server ("Default: 1MB",
// docs.nats.io, server configuration; 1<<20 bytes in nats-server's
// MAX_PAYLOAD_SIZE, from memory), so any message the bus delivers with
// default settings fits.
const DefaultMaxBytes = 1 << 20

// maxDepth bounds nesting inside a payload. Readings nest two levels; the
// rest is room for unknown keys added by newer producers.
const maxDepth = 64

// Decoded is one accepted reading of a payload.
type Decoded struct {
	rolling.Reading
	Ref    float64 // reference value (check standard); meaningful when HasRef
	HasRef bool    // the reading carried a ref: fit v - ref
	Unit   []byte  // the unit as sent, nil when absent; aliases the payload or the Decoder
}

// Reject is one refused reading of a payload.
type Reject struct {
	Index  int    // position of the reading in the payload, from 0
	Field  string // "t", "v", "ref" or "unit"; empty when the element is not an object
	Value  string // the offending JSON value as sent, cut to 64 bytes; empty when missing
	Reason Reason
	Err    error // ErrMissingField, ErrWrongType, ErrNonFinite, ErrNumberRange or a *TimeError
}

// Payload is the result of Decoder.Decode. Its slices belong to the
// Decoder and are valid until its next Decode; byte slices also alias the
// decoded data, which must not change meanwhile.
type Payload struct {
	Sensor   []byte // the "sensor" of a batch or single-reading object; nil when absent
	Readings []Decoded
	Rejects  []Reject // in payload order; one per refused reading
}

// PayloadError reports a payload refused as a whole: none of its readings
// are used. Err wraps ErrPayloadSyntax, ErrPayloadShape,
// ErrPayloadTooLarge or ErrLengthMismatch with detail.
type PayloadError struct {
	Offset int // byte offset in the payload where the problem was found
	Reason Reason
	Err    error
}

// Error gives the byte offset and the cause.
func (e *PayloadError) Error() string {
	return fmt.Sprintf("ingest: payload byte %d: %s", e.Offset, strings.TrimPrefix(e.Err.Error(), "ingest: "))
}

// Unwrap returns the cause.
func (e *PayloadError) Unwrap() error { return e.Err }

// Decoder decodes NATS message payloads holding sensor readings (JSON,
// RFC 8259). The zero value is ready to use. A Decoder reuses its memory
// from one Decode to the next, so decoding does not allocate per reading;
// it is not safe for concurrent use.
//
// A payload is one of
//
//	{"t": T, "v": V}                                        one reading
//	[{"t": T, "v": V}, ...]                                 readings
//	{"sensor": "id", "t": [T, ...], "v": [V, ...]}          a batch
//
// where T is an RFC 3339 string or a number of Unix seconds (see
// ParseTime; a string holding a number is accepted too) and V a number. A
// reading may carry "ref" (a number: the fit is then of v - ref) and
// "unit" (a string). A batch may carry a "ref" array of the same length,
// with null for readings without a reference, and one "unit" for all.
// null counts as absent. Keys are matched exactly (case-sensitive); other
// keys are ignored, so producers can add fields, but must hold valid
// JSON. When a key repeats, the last one counts, as in encoding/json.
// Strings are passed on as bytes after unescaping: invalid UTF-8 is not
// repaired.
//
// Problems with the payload as a whole return a *PayloadError. A reading
// that cannot be used is reported in Payload.Rejects with the first
// problem found (checking t, v, ref, unit in that order) and the other
// readings are kept.
type Decoder struct {
	// MaxBytes is the largest payload accepted, in bytes. Zero or less
	// means DefaultMaxBytes (1 MiB).
	MaxBytes int

	readings []Decoded
	rejects  []Reject
	scratch  []byte // unescaped strings; sized to the payload so it never moves

	unitSpan span // memo of the last unit converted, for batches
	unit     []byte

	// The elements of the last t, v and ref arrays of the top-level
	// object, listed while it is validated so a batch is scanned once.
	cols [3]column
}

// column lists the elements of one array of a batch.
type column struct {
	spans []span
	decs  []decimal // decs[i] is the number spans[i] holds, if ok
}

// decimal is a JSON number of the form [-]digits[.digits] with at most
// 19 digits, read while the scanner validated it: its digits as one
// integer and the count after the point. ok is false for a number of
// any other form (and for every other value), which is then parsed from
// its text.
type decimal struct {
	mant    uint64
	nFrac   int8
	nDigits int8
	neg, ok bool
}

// Indexes into Decoder.cols.
const (
	colT = iota
	colV
	colRef
)

// span is one JSON value found in the payload.
type span struct {
	start, end int  // the value's bytes, quotes included
	kind       byte // 0 absent, '"' string, '0' number, 't' 'f' 'n' literals, '{', '['
	esc        bool // a string holding backslash escapes
}

// fields are the known keys of an object.
type fields struct{ t, v, ref, unit, sensor span }

// Decode decodes data. The returned Payload is valid until the next call.
func (d *Decoder) Decode(data []byte) (Payload, error) {
	d.readings, d.rejects = d.readings[:0], d.rejects[:0]
	d.unitSpan, d.unit = span{}, nil
	limit := d.MaxBytes
	if limit <= 0 {
		limit = DefaultMaxBytes
	}
	if len(data) > limit {
		return Payload{}, &PayloadError{Offset: limit, Reason: ReasonOversized,
			Err: fmt.Errorf("%w: %d bytes, limit %d", ErrPayloadTooLarge, len(data), limit)}
	}
	if cap(d.scratch) < len(data) {
		d.scratch = make([]byte, 0, len(data))
	}
	d.scratch = d.scratch[:0]

	s := scanner{data: data}
	s.ws()
	var sensor []byte
	switch s.peek() {
	case '[':
		d.array(&s)
		s.end()
	case '{':
		var f fields
		s.object(&f, d, 1)
		if s.end() {
			sensor = d.object(&s, &f)
		}
	default:
		v := s.value(0)
		if s.end() {
			s.failShape(v.start, "want an object or an array")
		}
	}
	if s.bad() {
		return Payload{}, &PayloadError{Offset: s.errPos, Reason: s.errReason, Err: s.err}
	}
	return Payload{Sensor: sensor, Readings: d.readings, Rejects: d.rejects}, nil
}

// array decodes [reading, ...].
func (d *Decoder) array(s *scanner) {
	s.pos++ // '['
	s.ws()
	if s.peek() == ']' {
		s.pos++
		return
	}
	for idx := 0; ; idx++ {
		s.ws()
		if s.peek() == '{' {
			var f fields
			s.object(&f, d, 2)
			if s.bad() {
				return
			}
			d.reading(s.data, idx, &f)
		} else {
			v := s.value(1)
			if s.bad() {
				return
			}
			d.reject(s.data, idx, "", v, ReasonWrongType, ErrWrongType)
		}
		s.ws()
		switch s.peek() {
		case ',':
			s.pos++
		case ']':
			s.pos++
			return
		default:
			s.fail("want ',' or ']' after an array element")
			return
		}
	}
}

// object interprets the top-level object, already scanned into f, as a
// single reading or a batch, and returns the sensor.
func (d *Decoder) object(s *scanner, f *fields) []byte {
	var sensor []byte
	switch f.sensor.kind {
	case 0, 'n':
	case '"':
		sensor = d.str(s.data, f.sensor)
	default:
		s.errReason = ReasonWrongType
		s.failShape(f.sensor.start, "sensor must be a string")
		return nil
	}
	if f.t.kind != '[' && f.v.kind != '[' {
		d.reading(s.data, 0, f)
		return sensor
	}
	if f.t.kind != '[' || f.v.kind != '[' {
		at := f.t // point at the one that is not an array, if it is there
		if f.t.kind == '[' && f.v.kind != 0 || f.t.kind == 0 {
			at = f.v
		}
		s.failShape(at.start, "a batch needs arrays t and v")
		return nil
	}
	hasRef := f.ref.kind == '['
	if !hasRef && f.ref.kind != 0 && f.ref.kind != 'n' {
		s.failShape(f.ref.start, "ref of a batch must be an array")
		return nil
	}
	tc, vc, rc := &d.cols[colT], &d.cols[colV], &d.cols[colRef]
	ts, vs, rs := tc.spans, vc.spans, rc.spans
	if len(ts) != len(vs) || hasRef && len(rs) != len(ts) {
		msg := fmt.Errorf("%w: t has %d, v has %d", ErrLengthMismatch, len(ts), len(vs))
		if hasRef {
			msg = fmt.Errorf("%w: t has %d, v has %d, ref has %d", ErrLengthMismatch, len(ts), len(vs), len(rs))
		}
		s.err, s.errPos, s.errReason = msg, f.t.start, ReasonLengthMismatch
		return nil
	}
	// The common batch, numbers of a plain shape and a string unit or
	// none, is converted from what the scan read; anything else goes
	// through reading, which parses the text and reports problems.
	var unit []byte
	fast := true
	switch f.unit.kind {
	case 0, 'n':
	case '"':
		d.unitSpan, d.unit = f.unit, d.str(s.data, f.unit)
		unit = d.unit
	default:
		fast = false
	}
	for idx := range ts {
		if fast {
			t, v := &tc.decs[idx], &vc.decs[idx]
			var out Decoded
			ok := t.ok && v.ok && t.nDigits <= 18
			if ok {
				out.UnixNano, ok = decimalUnixNano(t.neg, t.mant, int(t.nFrac))
			}
			if ok && hasRef && rs[idx].kind != 'n' {
				r := &rc.decs[idx]
				ok = r.ok
				out.Ref, out.HasRef = decimalFloat(r.neg, r.mant, int(r.nFrac)), true
			}
			if ok {
				out.Value = decimalFloat(v.neg, v.mant, int(v.nFrac))
				out.Unit = unit
				d.readings = append(d.readings, out)
				continue
			}
		}
		g := fields{t: ts[idx], v: vs[idx], unit: f.unit}
		if hasRef {
			g.ref = rs[idx]
		}
		d.reading(s.data, idx, &g)
	}
	return sensor
}

// reading checks the fields of reading idx and records it as decoded or
// rejected.
func (d *Decoder) reading(data []byte, idx int, f *fields) {
	var out Decoded
	switch f.t.kind {
	case 0, 'n':
		d.reject(data, idx, "t", span{}, ReasonMissingField, ErrMissingField)
		return
	case '"', '0':
		raw := data[f.t.start:f.t.end]
		mark := len(d.scratch)
		if f.t.kind == '"' {
			raw = d.str(data, f.t)
		}
		ns, err := ParseTime(raw)
		d.scratch = d.scratch[:mark] // the unescaped time is not kept
		if err != nil {
			d.reject(data, idx, "t", f.t, ReasonBadTime, err)
			return
		}
		out.UnixNano = ns
	default:
		d.reject(data, idx, "t", f.t, ReasonWrongType, ErrWrongType)
		return
	}
	switch f.v.kind {
	case 0, 'n':
		d.reject(data, idx, "v", span{}, ReasonMissingField, ErrMissingField)
		return
	case '0':
		v, err := parseFloat(data[f.v.start:f.v.end])
		if err != nil { // the scanner admits only JSON numbers: this is overflow
			d.reject(data, idx, "v", f.v, ReasonNonFinite, err)
			return
		}
		out.Value = v
	default:
		d.reject(data, idx, "v", f.v, ReasonWrongType, ErrWrongType)
		return
	}
	switch f.ref.kind {
	case 0, 'n':
	case '0':
		v, err := parseFloat(data[f.ref.start:f.ref.end])
		if err != nil {
			d.reject(data, idx, "ref", f.ref, ReasonNonFinite, err)
			return
		}
		out.Ref, out.HasRef = v, true
	default:
		d.reject(data, idx, "ref", f.ref, ReasonWrongType, ErrWrongType)
		return
	}
	switch f.unit.kind {
	case 0, 'n':
	case '"':
		if f.unit != d.unitSpan {
			d.unitSpan, d.unit = f.unit, d.str(data, f.unit)
		}
		out.Unit = d.unit
	default:
		d.reject(data, idx, "unit", f.unit, ReasonWrongType, ErrWrongType)
		return
	}
	d.readings = append(d.readings, out)
}

func (d *Decoder) reject(data []byte, idx int, field string, v span, r Reason, err error) {
	rj := Reject{Index: idx, Field: field, Reason: r, Err: err}
	if v.kind != 0 {
		rj.Value = boundedString(data[v.start:v.end])
	}
	d.rejects = append(d.rejects, rj)
}

// str returns the contents of a string span: a subslice of data, or the
// unescaped bytes appended to d.scratch.
func (d *Decoder) str(data []byte, v span) []byte {
	raw := data[v.start+1 : v.end-1]
	if !v.esc {
		return raw
	}
	mark := len(d.scratch)
	d.scratch = unescape(d.scratch, raw)
	return d.scratch[mark:len(d.scratch):len(d.scratch)]
}

// unescape appends the JSON string contents src (already validated) with
// escapes resolved. Unpaired surrogates become U+FFFD, as in encoding/json.
func unescape(dst, src []byte) []byte {
	for i := 0; i < len(src); {
		c := src[i]
		if c != '\\' {
			dst = append(dst, c)
			i++
			continue
		}
		switch src[i+1] {
		case 'b':
			dst = append(dst, '\b')
		case 'f':
			dst = append(dst, '\f')
		case 'n':
			dst = append(dst, '\n')
		case 'r':
			dst = append(dst, '\r')
		case 't':
			dst = append(dst, '\t')
		case 'u':
			r := rune(hex4(src[i+2 : i+6]))
			i += 6
			if r >= 0xD800 && r < 0xDC00 && i+6 <= len(src) && src[i] == '\\' && src[i+1] == 'u' {
				if lo := rune(hex4(src[i+2 : i+6])); lo >= 0xDC00 && lo < 0xE000 {
					r = 0x10000 + (r-0xD800)<<10 + (lo - 0xDC00)
					i += 6
				}
			}
			dst = utf8.AppendRune(dst, r) // surrogates left alone encode as U+FFFD
			continue
		default: // '"', '\\', '/'
			dst = append(dst, src[i+1])
		}
		i += 2
	}
	return dst
}

// hex4 returns the value of four hex digits, or -1.
func hex4(b []byte) int {
	n := 0
	for _, c := range b[:4] {
		switch {
		case c >= '0' && c <= '9':
			c -= '0'
		case c >= 'a' && c <= 'f':
			c -= 'a' - 10
		case c >= 'A' && c <= 'F':
			c -= 'A' - 10
		default:
			return -1
		}
		n = n<<4 | int(c)
	}
	return n
}

// scanner walks a JSON text (RFC 8259) and validates what it passes over.
type scanner struct {
	data      []byte
	pos       int
	err       error
	errPos    int
	errReason Reason
	dec       decimal // the last number scanned
}

func (s *scanner) bad() bool { return s.err != nil }

func (s *scanner) peek() byte {
	if s.pos < len(s.data) {
		return s.data[s.pos]
	}
	return 0
}

// fail records a syntax error at the current position.
func (s *scanner) fail(msg string) { s.failAt(s.pos, ErrPayloadSyntax, msg) }

// failShape records valid JSON of the wrong structure.
func (s *scanner) failShape(pos int, msg string) { s.failAt(pos, ErrPayloadShape, msg) }

func (s *scanner) failAt(pos int, sentinel error, msg string) {
	if s.err != nil {
		return
	}
	if s.pos >= len(s.data) && sentinel == ErrPayloadSyntax {
		msg = "unexpected end of payload"
	}
	s.err, s.errPos = fmt.Errorf("%w: %s", sentinel, msg), pos
	if s.errReason == ReasonUnknown {
		s.errReason = ReasonMalformed
	}
}

// end checks that only white space follows the payload and reports
// whether the scan is still good.
func (s *scanner) end() bool {
	if s.bad() {
		return false
	}
	s.ws()
	if s.pos != len(s.data) {
		s.fail("data after the payload")
		return false
	}
	return true
}

func (s *scanner) ws() {
	for s.pos < len(s.data) {
		switch s.data[s.pos] {
		case ' ', '\t', '\n', '\r':
			s.pos++
		default:
			return
		}
	}
}

// value scans one value at depth (the number of containers around it).
func (s *scanner) value(depth int) span {
	s.ws()
	start := s.pos
	switch c := s.peek(); {
	case c == '"':
		esc := s.str()
		return span{start, s.pos, '"', esc}
	case c == '-' || (c >= '0' && c <= '9'):
		s.num()
		return span{start, s.pos, '0', false}
	case c == '{':
		s.object(nil, nil, depth+1)
		return span{start, s.pos, '{', false}
	case c == '[':
		s.array(depth+1, nil)
		return span{start, s.pos, '[', false}
	case c == 't':
		s.literal("true")
	case c == 'f':
		s.literal("false")
	case c == 'n':
		s.literal("null")
	default:
		s.fail("want a value")
		return span{}
	}
	return span{start, s.pos, s.data[start], false}
}

func (s *scanner) literal(word string) {
	if len(s.data)-s.pos < len(word) || string(s.data[s.pos:s.pos+len(word)]) != word {
		s.fail("want a value")
		return
	}
	s.pos += len(word)
}

// str scans a string starting at its opening quote and reports whether
// it holds escapes.
func (s *scanner) str() (esc bool) {
	data := s.data
	for i := s.pos + 1; i < len(data); {
		switch c := data[i]; {
		case c == '"':
			s.pos = i + 1
			return esc
		case c == '\\':
			esc = true
			if i+1 >= len(data) {
				i++
				continue
			}
			switch data[i+1] {
			case '"', '\\', '/', 'b', 'f', 'n', 'r', 't':
				i += 2
			case 'u':
				if i+6 > len(data) || hex4(data[i+2:i+6]) < 0 {
					s.pos = i
					s.fail("invalid \\u escape")
					return
				}
				i += 6
			default:
				s.pos = i
				s.fail("invalid escape")
				return
			}
		case c < 0x20:
			s.pos = i
			s.fail("control character in string")
			return
		default:
			i++
		}
	}
	s.pos = len(data)
	s.fail("unterminated string")
	return
}

// num scans -?(0|[1-9][0-9]*)(\.[0-9]+)?([eE][+-]?[0-9]+)? and leaves
// what it read in s.dec.
func (s *scanner) num() {
	data, i := s.data, s.pos
	var mant uint64
	neg := data[i] == '-'
	if neg {
		i++
	}
	start := i
	switch {
	case i < len(data) && data[i] == '0':
		i++
	case i < len(data) && data[i] >= '1' && data[i] <= '9':
		for ; i < len(data) && data[i] >= '0' && data[i] <= '9'; i++ {
			mant = mant*10 + uint64(data[i]-'0')
		}
	default:
		s.pos = i
		s.fail("malformed number")
		return
	}
	nInt, nFrac := i-start, 0
	if i < len(data) && data[i] == '.' {
		i++
		fs := i
		for ; i < len(data) && data[i] >= '0' && data[i] <= '9'; i++ {
			mant = mant*10 + uint64(data[i]-'0')
		}
		if nFrac = i - fs; nFrac == 0 {
			s.pos = i
			s.fail("malformed number")
			return
		}
	}
	plain := true
	s.dec = decimal{}
	if i < len(data) && (data[i] == 'e' || data[i] == 'E') {
		plain = false
		i++
		if i < len(data) && (data[i] == '+' || data[i] == '-') {
			i++
		}
		start := i
		for i < len(data) && data[i] >= '0' && data[i] <= '9' {
			i++
		}
		if i == start {
			s.pos = i
			s.fail("malformed number")
			return
		}
	}
	s.pos = i
	// Past 19 digits mant wrapped: such numbers are parsed from the text.
	if n := nInt + nFrac; plain && n <= 19 {
		s.dec = decimal{mant: mant, nFrac: int8(nFrac), nDigits: int8(n), neg: neg, ok: true}
	}
}

// object scans an object at its '{'. With f non-nil it records the values
// of the known keys in f, using d to unescape keys.
func (s *scanner) object(f *fields, d *Decoder, depth int) {
	if depth > maxDepth {
		s.failShape(s.pos, "nested too deep")
		return
	}
	s.pos++ // '{'
	s.ws()
	if s.peek() == '}' {
		s.pos++
		return
	}
	for {
		s.ws()
		if s.peek() != '"' {
			s.fail("want a string key")
			return
		}
		kstart := s.pos
		kesc := s.str()
		kend := s.pos
		s.ws()
		if s.bad() {
			return
		}
		if s.peek() != ':' {
			s.fail("want ':' after a key")
			return
		}
		s.pos++
		if f == nil {
			s.value(depth)
		} else {
			key := s.data[kstart+1 : kend-1]
			mark := len(d.scratch)
			if kesc {
				d.scratch = unescape(d.scratch, key)
				key = d.scratch[mark:]
			}
			var dst *span
			col := -1
			switch string(key) {
			case "t":
				dst, col = &f.t, colT
			case "v":
				dst, col = &f.v, colV
			case "ref":
				dst, col = &f.ref, colRef
			case "unit":
				dst = &f.unit
			case "sensor":
				dst = &f.sensor
			}
			d.scratch = d.scratch[:mark]
			var v span
			if col >= 0 && depth == 1 {
				v = s.listing(depth, &d.cols[col])
			} else {
				v = s.value(depth)
			}
			if dst != nil {
				*dst = v
			}
		}
		if s.bad() {
			return
		}
		s.ws()
		switch s.peek() {
		case ',':
			s.pos++
		case '}':
			s.pos++
			return
		default:
			s.fail("want ',' or '}' after an object member")
			return
		}
	}
}

// listing scans one value like value and, when it is an array, lists
// its elements in col.
func (s *scanner) listing(depth int, col *column) span {
	s.ws()
	if s.peek() != '[' {
		return s.value(depth)
	}
	start := s.pos
	col.spans, col.decs = col.spans[:0], col.decs[:0]
	s.array(depth+1, col)
	return span{start, s.pos, '[', false}
}

// array scans an array at its '['; with col non-nil it lists every
// element in col.
func (s *scanner) array(depth int, col *column) {
	if depth > maxDepth {
		s.failShape(s.pos, "nested too deep")
		return
	}
	s.pos++ // '['
	s.ws()
	if s.peek() == ']' {
		s.pos++
		return
	}
	for {
		v := s.value(depth)
		if s.bad() {
			return
		}
		if col != nil {
			// s.dec is this element's only when the element is a number:
			// a nested array leaves its own last number there.
			d := s.dec
			if v.kind != '0' {
				d = decimal{}
			}
			col.spans = append(col.spans, v)
			col.decs = append(col.decs, d)
		}
		s.ws()
		switch s.peek() {
		case ',':
			s.pos++
		case ']':
			s.pos++
			return
		default:
			s.fail("want ',' or ']' after an array element")
			return
		}
	}
}
