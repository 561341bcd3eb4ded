package ingest

import (
	"errors"
	"fmt"
	"io"
	"strings"
	"time"

	"driftfit/rolling"
)

// Limits of the CSV reader.
const (
	csvBufSize = 64 << 10 // read size; large enough that refills are rare per row
	// csvMaxRow bounds the bytes kept for one row, so an unclosed quote
	// in a large file cannot swallow it into memory. A sensor id, a time
	// and a number need well under 1 KiB.
	csvMaxRow = 64 << 10
)

// RowError reports a bad data row of a CSV file. Err is the cause, one of
// the sentinels of this package (ErrFieldCount, ErrBareQuote, ErrQuote,
// ErrRowTooLong, ErrEmptyField, ErrTimeSyntax, ErrTimeRange,
// ErrTimePrecision, ErrNumberSyntax, ErrNonFinite, ErrNumberRange), possibly wrapped with
// detail.
type RowError struct {
	Line  int    // 1-based line on which the row starts
	Field string // "sensor", "time" or "value"; empty for a problem with the whole row
	Value string // the offending field, cut to 64 bytes; empty when Field is
	Err   error
}

// Error gives the line, the field and value when known, and the cause.
func (e *RowError) Error() string {
	cause := strings.TrimPrefix(e.Err.Error(), "ingest: ")
	if e.Field == "" {
		return fmt.Sprintf("ingest: line %d: %s", e.Line, cause)
	}
	return fmt.Sprintf("ingest: line %d: %s %q: %s", e.Line, e.Field, e.Value, cause)
}

// Unwrap returns the cause.
func (e *RowError) Unwrap() error { return e.Err }

// CSVReader reads sensor readings from CSV (RFC 4180) in the layout of
// replay files: a header row naming at least the columns sensor, time and
// value, in any order (other columns are ignored), then one reading per
// row. Fields may be quoted, with "" for a quote inside, and may then hold
// commas and line breaks; lines end in LF or CRLF. Blank lines are skipped
// and a UTF-8 byte order mark before the header is ignored.
//
// Use it like bufio.Scanner:
//
//	for cr.Next() {
//		sensor, rd, err := cr.Row()
//		...
//	}
//	if err := cr.Err(); err != nil { ... }
//
// A bad row does not stop the reader: Row reports it and Next moves on.
// The reader does not allocate per row once its buffers have grown to the
// longest row. It is not safe for concurrent use.
type CSVReader struct {
	r        io.Reader
	buf      []byte
	pos, end int
	eof      bool
	err      error // sticky I/O error

	rec     []byte // the current record's fields, concatenated
	ends    []int  // end offset in rec of each field
	recErr  error  // syntax problem of the current record
	tooLong bool
	lineNo  int // line of the next unread byte
	line    int // line on which the current record starts

	ncol                         int
	colSensor, colTime, colValue int
	special                      *[256]bool // bytes that end a run of plain field bytes
	comma                        byte
	loc                          *time.Location // zone of local times; nil: none accepted

	sensor []byte
	rd     rolling.Reading
	rowErr error
}

// CSVOptions adapt the reader to files from other programs, such as a
// process historian's export. The zero value reads replay files.
type CSVOptions struct {
	// Sensor, Time and Value name the header columns of the sensor id,
	// the time and the value; empty means "sensor", "time" and "value".
	// Names match the header fields exactly.
	Sensor, Time, Value string
	// Comma is the field delimiter; 0 means ','. It must be a single
	// byte other than '"', CR and LF (';' and '\t' are common).
	Comma byte
	// Location, when set, makes times without an offset, as
	// "2006-01-02 15:04:05" (or with a T, and with a fraction of a
	// second), readable as wall-clock times in that zone, as
	// time.ParseInLocation reads them: a time that a change to summer
	// time skips is moved forward by the change, and one repeated when
	// it ends is taken at its first occurrence (Go's time.Date). RFC
	// 3339 times and Unix seconds read as always. Nil: such times are
	// bad rows.
	Location *time.Location
}

// NewCSVReader reads and checks the header row of r, with the default
// options. The error wraps ErrNoHeader, ErrMissingColumn or
// ErrDuplicateColumn (naming the column), a *RowError for a malformed
// header, or the I/O error from r.
func NewCSVReader(r io.Reader) (*CSVReader, error) {
	return NewCSVReaderOptions(r, CSVOptions{})
}

// NewCSVReaderOptions is NewCSVReader with options. A delimiter that
// cannot be one wraps ErrDelimiter.
func NewCSVReaderOptions(r io.Reader, o CSVOptions) (*CSVReader, error) {
	c := &CSVReader{r: r, buf: make([]byte, csvBufSize), lineNo: 1, special: &isSpecial, comma: ',', loc: o.Location}
	if o.Comma != 0 && o.Comma != ',' {
		if o.Comma == '"' || o.Comma == '\r' || o.Comma == '\n' {
			return nil, fmt.Errorf("%w: %q", ErrDelimiter, o.Comma)
		}
		sp := isSpecial
		sp[','], sp[o.Comma] = false, true
		c.special, c.comma = &sp, o.Comma
	}
	if !c.readRecord() {
		if c.err != nil {
			return nil, fmt.Errorf("ingest: read csv header: %w", c.err)
		}
		return nil, ErrNoHeader
	}
	if c.recErr != nil {
		return nil, &RowError{Line: c.line, Err: c.recErr}
	}
	if bom := "\uFEFF"; c.line == 1 && strings.HasPrefix(string(c.rec), bom) {
		// Spreadsheet programs start UTF-8 files with a byte order mark.
		c.rec = c.rec[len(bom):]
		for i := range c.ends {
			c.ends[i] -= len(bom)
		}
	}
	c.ncol = len(c.ends)
	cols := [...]struct {
		name string
		idx  *int
	}{{or(o.Sensor, "sensor"), &c.colSensor}, {or(o.Time, "time"), &c.colTime}, {or(o.Value, "value"), &c.colValue}}
	for _, col := range cols {
		*col.idx = -1
		for i := range c.ends {
			if string(c.field(i)) != col.name {
				continue
			}
			if *col.idx >= 0 {
				return nil, fmt.Errorf("%w: %q", ErrDuplicateColumn, col.name)
			}
			*col.idx = i
		}
		if *col.idx < 0 {
			return nil, fmt.Errorf("%w: %q", ErrMissingColumn, col.name)
		}
	}
	return c, nil
}

func or(s, def string) string {
	if s == "" {
		return def
	}
	return s
}

// Next advances to the next data row, good or bad. It returns false at the
// end of the input or on an I/O error (see Err).
func (c *CSVReader) Next() bool {
	c.sensor, c.rd, c.rowErr = nil, rolling.Reading{}, nil
	if !c.readRecord() {
		return false
	}
	c.rowErr = c.parseRow()
	return true
}

// Row returns the current row. For a bad row err is a *RowError and the
// other results are zero. sensor aliases an internal buffer and is valid
// until the next call to Next.
func (c *CSVReader) Row() (sensor []byte, rd rolling.Reading, err error) {
	return c.sensor, c.rd, c.rowErr
}

// Line returns the 1-based line number on which the current row starts
// (the header is line 1 when the file starts with it).
func (c *CSVReader) Line() int { return c.line }

// Err returns the first I/O error met, or nil at a clean end of input.
// Bad rows are not I/O errors: they come back from Row.
func (c *CSVReader) Err() error { return c.err }

func (c *CSVReader) field(i int) []byte {
	start := 0
	if i > 0 {
		start = c.ends[i-1]
	}
	return c.rec[start:c.ends[i]]
}

func (c *CSVReader) parseRow() error {
	switch {
	case c.tooLong:
		return &RowError{Line: c.line, Err: fmt.Errorf("%w: over %d bytes", ErrRowTooLong, csvMaxRow)}
	case c.recErr != nil:
		return &RowError{Line: c.line, Err: c.recErr}
	case len(c.ends) != c.ncol:
		return &RowError{Line: c.line, Err: fmt.Errorf("%w: %d, header has %d", ErrFieldCount, len(c.ends), c.ncol)}
	}
	sensor := c.field(c.colSensor)
	if len(sensor) == 0 {
		return &RowError{Line: c.line, Field: "sensor", Err: ErrEmptyField}
	}
	tb := c.field(c.colTime)
	ns, err := ParseTime(tb)
	if err != nil && c.loc != nil {
		if t, ok := parseLocal(tb, c.loc); ok {
			ns, err = t, nil
		}
	}
	if err != nil {
		var te *TimeError
		if errors.As(err, &te) {
			err = te.Err
		}
		return &RowError{Line: c.line, Field: "time", Value: boundedString(tb), Err: err}
	}
	vb := c.field(c.colValue)
	v, err := parseFloat(vb)
	if err != nil {
		return &RowError{Line: c.line, Field: "value", Value: boundedString(vb), Err: err}
	}
	c.sensor, c.rd = sensor, rolling.Reading{UnixNano: ns, Value: v}
	return nil
}

// localLayouts are the wall-clock forms a historian writes.
var localLayouts = [...]string{"2006-01-02 15:04:05", "2006-01-02T15:04:05"}

// parseLocal reads a wall-clock time without offset in loc; ok is false
// when b is not one, or lies outside the int64 nanosecond range.
func parseLocal(b []byte, loc *time.Location) (int64, bool) {
	if len(b) < len(localLayouts[0]) || len(b) > 40 {
		return 0, false
	}
	s := string(b) // rare path: only times ParseTime refused
	for _, layout := range localLayouts {
		if t, err := time.ParseInLocation(layout, s, loc); err == nil {
			if t.Year() < 1678 || t.Year() > 2261 {
				return 0, false
			}
			return t.UnixNano(), true
		}
	}
	return 0, false
}

// fill makes at least one unread byte available, reading from c.r when
// the buffer is used up. It returns false at end of input or on error.
// Bytes before c.pos may be overwritten: callers copy what they keep.
func (c *CSVReader) fill() bool {
	if c.pos < c.end {
		return true
	}
	if c.eof || c.err != nil {
		return false
	}
	c.pos, c.end = 0, 0
	for empty := 0; empty < 100; empty++ {
		n, err := c.r.Read(c.buf)
		c.end = n
		if err == io.EOF {
			c.eof = true
		} else if err != nil {
			c.err = err
		}
		if n > 0 {
			return true
		}
		if err != nil {
			return false
		}
	}
	c.err = io.ErrNoProgress
	return false
}

func (c *CSVReader) add(p []byte) {
	if len(c.rec)+len(p) > csvMaxRow {
		c.tooLong = true
		return
	}
	c.rec = append(c.rec, p...)
}

func (c *CSVReader) addByte(b byte) {
	if len(c.rec) >= csvMaxRow {
		c.tooLong = true
		return
	}
	c.rec = append(c.rec, b)
}

func (c *CSVReader) setErr(err error) {
	if c.recErr == nil {
		c.recErr = err
	}
}

// isSpecial marks the bytes that end a run of plain field bytes.
var isSpecial = [256]bool{',': true, '\n': true, '\r': true, '"': true}

// readRecord reads the next non-blank record into c.rec and c.ends. It
// follows RFC 4180 and, where the RFC leaves room, encoding/csv: CRLF
// inside a quoted field becomes LF, a lone CR is data, and a CR just
// before the end of input is dropped. A syntax problem is recorded in
// c.recErr and the record still ends where a lenient reading says, so the
// next row starts in the right place.
func (c *CSVReader) readRecord() bool {
	c.rec, c.ends, c.recErr, c.tooLong = c.rec[:0], c.ends[:0], nil, false
	for { // blank lines
		if c.pos >= c.end && !c.fill() {
			return false
		}
		switch c.buf[c.pos] {
		case '\n':
			c.pos++
			c.lineNo++
			continue
		case '\r':
			if c.pos+1 < c.end && c.buf[c.pos+1] == '\n' {
				c.pos += 2
				c.lineNo++
				continue
			}
			if c.pos+1 == c.end {
				c.pos++
				if c.pos >= c.end && !c.fill() {
					return false // CR at end of input
				}
				if c.buf[c.pos] == '\n' {
					c.pos++
					c.lineNo++
					continue
				}
				c.addByte('\r') // lone CR opens an unquoted field
				return c.readFields(false)
			}
		}
		break
	}
	c.line = c.lineNo
	return c.readFields(true)
}

// readFields reads fields until the end of the record. atFieldStart is
// false when readRecord has already put a byte of the first field into
// c.rec.
func (c *CSVReader) readFields(atFieldStart bool) bool {
	if !atFieldStart {
		c.line = c.lineNo
	}
	for {
		quoted := atFieldStart && (c.pos < c.end || c.fill()) && c.buf[c.pos] == '"'
		atFieldStart = true
		if quoted {
			c.pos++
			if !c.readQuoted() {
				c.ends = append(c.ends, len(c.rec))
				return true // end of input inside the field
			}
		}
		// Unquoted field, or what follows a closing quote.
		for {
			if c.pos >= c.end && !c.fill() {
				c.ends = append(c.ends, len(c.rec))
				return true
			}
			i := c.pos
			buf, special := c.buf[:c.end], c.special
			for i < len(buf) && !special[buf[i]] {
				i++
			}
			if i > c.pos {
				if quoted {
					c.setErr(ErrQuote)
				}
				c.add(buf[c.pos:i])
				c.pos = i
				continue
			}
			b := buf[i]
			c.pos++
			switch b {
			case c.comma:
				c.ends = append(c.ends, len(c.rec))
			case '\n':
				c.lineNo++
				c.ends = append(c.ends, len(c.rec))
				return true
			case '\r':
				if c.pos >= c.end && !c.fill() {
					c.ends = append(c.ends, len(c.rec))
					return true // CR at end of input is dropped
				}
				if c.buf[c.pos] == '\n' {
					c.pos++
					c.lineNo++
					c.ends = append(c.ends, len(c.rec))
					return true
				}
				if quoted {
					c.setErr(ErrQuote)
				}
				c.addByte('\r')
				continue
			case '"':
				if quoted {
					c.setErr(ErrQuote)
				} else {
					c.setErr(ErrBareQuote)
				}
				c.addByte('"')
				continue
			}
			break // after ','
		}
	}
}

// readQuoted reads a quoted field after its opening quote, up to and
// including the closing quote. It returns false if the input ends first.
func (c *CSVReader) readQuoted() bool {
	for {
		if c.pos >= c.end && !c.fill() {
			c.setErr(ErrQuote)
			return false
		}
		buf := c.buf[:c.end]
		i := c.pos
		for i < len(buf) && buf[i] != '"' && buf[i] != '\n' && buf[i] != '\r' {
			i++
		}
		c.add(buf[c.pos:i])
		c.pos = i
		if i == len(buf) {
			continue
		}
		c.pos++
		switch buf[i] {
		case '\n':
			c.lineNo++
			c.addByte('\n')
		case '\r':
			if c.pos >= c.end && !c.fill() {
				c.setErr(ErrQuote)
				return false
			}
			if c.buf[c.pos] == '\n' {
				c.pos++
				c.lineNo++
				c.addByte('\n')
			} else {
				c.addByte('\r')
			}
		case '"':
			if (c.pos < c.end || c.fill()) && c.buf[c.pos] == '"' {
				c.pos++
				c.addByte('"')
				continue
			}
			return true
		}
	}
}
