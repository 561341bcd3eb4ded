package ingest_test

import (
	"bytes"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"strconv"
	"strings"
	"testing"
	"testing/iotest"
	"time"

	"driftfit/ingest"
	"driftfit/rolling"
)

// csvRow is one outcome of CSVReader: a reading or a row error.
type csvRow struct {
	line   int
	sensor string
	rd     rolling.Reading
	err    error
}

func (r csvRow) String() string {
	if r.err != nil {
		return fmt.Sprintf("line %d: %v", r.line, r.err)
	}
	return fmt.Sprintf("line %d: %s %d %v", r.line, r.sensor, r.rd.UnixNano, r.rd.Value)
}

// readAllCSV runs a CSVReader over r to the end.
func readAllCSV(t testing.TB, r io.Reader) ([]csvRow, error) {
	t.Helper()
	cr, err := ingest.NewCSVReader(r)
	if err != nil {
		return nil, err
	}
	var rows []csvRow
	for cr.Next() {
		s, rd, err := cr.Row()
		rows = append(rows, csvRow{line: cr.Line(), sensor: string(s), rd: rd, err: err})
	}
	return rows, cr.Err()
}

func TestNewCSVReader_Header(t *testing.T) {
	tests := []struct {
		name   string
		in     string
		err    error
		column string // named in the error
	}{
		{"plain", "sensor,time,value\n", nil, ""},
		{"any order and extra columns", "note,value,time,unit,sensor\r\n", nil, ""},
		{"quoted names", "\"sensor\",\"time\",\"value\"", nil, ""},
		{"byte order mark", "\uFEFFsensor,time,value\n", nil, ""},
		{"blank lines first", "\n\r\nsensor,time,value\n", nil, ""},
		{"empty input", "", ingest.ErrNoHeader, ""},
		{"only blank lines", "\n\n\r\n", ingest.ErrNoHeader, ""},
		{"missing time", "sensor,value\n", ingest.ErrMissingColumn, `"time"`},
		{"missing sensor", "id,time,value\n", ingest.ErrMissingColumn, `"sensor"`},
		{"names are case sensitive", "sensor,time,Value\n", ingest.ErrMissingColumn, `"value"`},
		{"duplicate", "sensor,time,value,time\n", ingest.ErrDuplicateColumn, `"time"`},
		{"broken quote", "sensor,\"time,value\n", ingest.ErrQuote, ""},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := ingest.NewCSVReader(strings.NewReader(tt.in))
			if !errors.Is(err, tt.err) || (tt.err != nil && !strings.Contains(err.Error(), tt.column)) {
				t.Fatalf("NewCSVReader(%q) error = %v, want %v naming %s", tt.in, err, tt.err, tt.column)
			}
		})
	}
}

func TestCSVReader_Rows(t *testing.T) {
	// 1767225600 s is 2026-01-01T00:00:00Z (time.Date below agrees).
	t0 := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	good := func(line int, sensor string, ns int64, v float64) csvRow {
		return csvRow{line: line, sensor: sensor, rd: rolling.Reading{UnixNano: ns, Value: v}}
	}
	bad := func(line int, field string, cause error) csvRow {
		return csvRow{line: line, err: &ingest.RowError{Line: line, Field: field, Err: cause}}
	}
	// Quoting, "" escapes and fields spanning lines follow RFC 4180
	// section 2 rules 5-7; blank lines and a final CR follow encoding/csv.
	tests := []struct {
		name string
		in   string
		want []csvRow
	}{
		{"typical", "sensor,time,value\nplantA.boiler2.pt-101,1767225600.5,101.325\n",
			[]csvRow{good(2, "plantA.boiler2.pt-101", t0+5e8, 101.325)}},
		{"crlf, no final newline, rfc 3339",
			"value,sensor,time\r\n-4.5e-3,s1,2026-01-01T01:00:00+01:00\r\n7,s2,2026-01-01T00:00:00.000000001z",
			[]csvRow{good(2, "s1", t0, -4.5e-3), good(3, "s2", t0+1, 7)}},
		{"quoted fields with comma, quote and newlines",
			"sensor,time,value,note\n\"a,b\"\"c\",\"1767225600\",\"1.5\",\"two\r\nlines\"\nd,1767225600,2,x\n",
			[]csvRow{good(2, `a,b"c`, t0, 1.5), good(4, "d", t0, 2)}},
		{"blank lines skipped and counted", "sensor,time,value\n\ns,1767225600,1\n\r\n\ns,1767225601,2\n",
			[]csvRow{good(3, "s", t0, 1), good(6, "s", t0+1e9, 2)}},
		{"bad rows kept apart from good ones",
			"sensor,time,value\n" +
				"s,1767225600,1\n" +
				",1767225600,1\n" + // line 3
				"s,yesterday,1\n" +
				"s,1767225600.1234567891,1\n" +
				"s,9999999999999,1\n" +
				"s,1767225600,abc\n" +
				"s,1767225600,NaN\n" +
				"s,1767225600,-Inf\n" + // line 9
				"s,1767225600,1e999\n" +
				"s,1767225600,\n" +
				"s,1767225600\n" +
				"s,1767225600,1,extra\n" +
				"s,17672\"25600,1\n" + // line 14
				"s,\"1767225600\"x,1\n" +
				"s,1767225601,2\n",
			[]csvRow{
				good(2, "s", t0, 1),
				bad(3, "sensor", ingest.ErrEmptyField),
				bad(4, "time", ingest.ErrTimeSyntax),
				bad(5, "time", ingest.ErrTimePrecision),
				bad(6, "time", ingest.ErrTimeRange),
				bad(7, "value", ingest.ErrNumberSyntax),
				bad(8, "value", ingest.ErrNonFinite),
				bad(9, "value", ingest.ErrNonFinite),
				bad(10, "value", ingest.ErrNonFinite),
				bad(11, "value", ingest.ErrEmptyField),
				bad(12, "", ingest.ErrFieldCount),
				bad(13, "", ingest.ErrFieldCount),
				bad(14, "", ingest.ErrBareQuote),
				bad(15, "", ingest.ErrQuote),
				good(16, "s", t0+1e9, 2),
			}},
		{"unclosed quote runs to the end", "sensor,time,value\ns,1767225600,1\ns,\"1767225600,1\nt,1767225600,1\n",
			[]csvRow{good(2, "s", t0, 1), bad(3, "", ingest.ErrQuote)}},
		// strconv.ParseFloat semantics: hex floats and Go digit separators
		// are numbers, spaces are not; a value below the smallest float64
		// subnormal (4.9e-324) is refused rather than read as zero.
		{"strconv float forms", "sensor,time,value\ns,0,0x1p-2\ns,0,1_0\ns,0,-0\ns,0,1e-400\ns,0, 1\ns,0,1.5.2\n",
			[]csvRow{good(2, "s", 0, 0.25), good(3, "s", 0, 10), good(4, "s", 0, math.Copysign(0, -1)), bad(5, "value", ingest.ErrNumberRange),
				bad(6, "value", ingest.ErrNumberSyntax), bad(7, "value", ingest.ErrNumberSyntax)}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := readAllCSV(t, strings.NewReader(tt.in))
			if err != nil {
				t.Fatalf("read: %v", err)
			}
			if len(got) != len(tt.want) {
				t.Fatalf("got %d rows %v, want %d %v", len(got), got, len(tt.want), tt.want)
			}
			for i, w := range tt.want {
				g := got[i]
				if w.err != nil {
					var re, wre *ingest.RowError
					errors.As(w.err, &wre)
					if !errors.As(g.err, &re) || re.Line != wre.Line || re.Field != wre.Field || !errors.Is(re, wre.Err) || g.line != w.line {
						t.Errorf("row %d = %v, want RowError line %d field %q cause %v", i, g, wre.Line, wre.Field, wre.Err)
					}
					continue
				}
				if g.err != nil || g.line != w.line || g.sensor != w.sensor || g.rd.UnixNano != w.rd.UnixNano ||
					math.Float64bits(g.rd.Value) != math.Float64bits(w.rd.Value) {
					t.Errorf("row %d = %v, want %v", i, g, w)
				}
			}
		})
	}
}

func TestRowError_Message(t *testing.T) {
	_, err := readAllCSV(t, strings.NewReader("sensor,time,value\n"))
	if err != nil {
		t.Fatal(err)
	}
	rows, _ := readAllCSV(t, strings.NewReader("sensor,time,value\ns,1767225600,1e999\n"))
	if len(rows) != 1 || rows[0].err == nil {
		t.Fatalf("rows = %v, want one bad row", rows)
	}
	const want = `ingest: line 2: value "1e999": non-finite number`
	if got := rows[0].err.Error(); got != want {
		t.Errorf("RowError.Error() = %q, want %q", got, want)
	}
}

type errReader struct{ err error }

func (r errReader) Read([]byte) (int, error) { return 0, r.err }

func TestCSVReader_IOError(t *testing.T) {
	boom := errors.New("disk on fire")
	r := io.MultiReader(strings.NewReader("sensor,time,value\ns,1767225600,1\n"), errReader{boom})
	rows, err := readAllCSV(t, r)
	if !errors.Is(err, boom) || len(rows) != 1 || rows[0].err != nil {
		t.Fatalf("rows %v, Err() = %v; want 1 good row, then %v", rows, err, boom)
	}
	if _, err := ingest.NewCSVReader(errReader{boom}); !errors.Is(err, boom) {
		t.Fatalf("NewCSVReader(failing reader) = %v, want %v", err, boom)
	}
}

// randomCSV writes a valid replay file, with random column order, extra
// columns, quoting, line ends and blank lines, and returns it with the
// readings it holds in order (line numbers are left to encoding/csv).
func randomCSV(rng *rand.Rand, rows int) ([]byte, []csvRow) {
	var b bytes.Buffer
	cols := []string{"sensor", "time", "value", "note", "unit"}[:3+rng.IntN(3)]
	rng.Shuffle(len(cols), func(i, j int) { cols[i], cols[j] = cols[j], cols[i] })
	nl := "\n"
	if rng.IntN(2) == 0 {
		nl = "\r\n"
	}
	quote := func(s string, must bool) string {
		if must || rng.IntN(5) == 0 {
			return `"` + strings.ReplaceAll(s, `"`, `""`) + `"`
		}
		return s
	}
	text := func(alphabet string) string {
		var sb strings.Builder
		for range rng.IntN(12) {
			sb.WriteByte(alphabet[rng.IntN(len(alphabet))])
		}
		return sb.String()
	}
	for i, c := range cols {
		if i > 0 {
			b.WriteByte(',')
		}
		b.WriteString(quote(c, false))
	}
	b.WriteString(nl)
	want := make([]csvRow, 0, rows)
	for range rows {
		for rng.IntN(10) == 0 {
			b.WriteString(nl)
		}
		sensor := "plantB." + text("abcxyz019.-_")
		special := rng.IntN(8) == 0
		if special {
			sensor += text(`,"` + "\n ")
		}
		ns := int64(rng.Uint64N(uint64(100*365*86400e9))) - 30*365*86400e9
		ts := formatSeconds(rng, ns)
		if rng.IntN(2) == 0 {
			ts = time.Unix(0, ns).UTC().Format(time.RFC3339Nano)
		}
		v := rng.NormFloat64() * math.Pow(10, float64(rng.IntN(12)-6))
		vs := strconv.FormatFloat(v, "gef"[rng.IntN(3)], -1, 64)
		want = append(want, csvRow{sensor: sensor, rd: rolling.Reading{UnixNano: ns, Value: v}})
		for i, c := range cols {
			if i > 0 {
				b.WriteByte(',')
			}
			switch c {
			case "sensor":
				b.WriteString(quote(sensor, special))
			case "time":
				b.WriteString(quote(ts, false))
			case "value":
				b.WriteString(quote(vs, false))
			default:
				b.WriteString(quote(text("ab ,\"\n\r"), true))
			}
		}
		b.WriteString(nl)
	}
	if rng.IntN(2) == 0 { // no line end after the last row
		b.Truncate(b.Len() - len(nl))
	}
	return b.Bytes(), want
}

// stdCSV reads data with encoding/csv, the reference, and returns its data
// records with the line each starts on, and the header.
func stdCSV(data []byte) (header []string, recs [][]string, lines []int, err error) {
	r := csv.NewReader(bytes.NewReader(data))
	header, err = r.Read()
	if err != nil {
		return nil, nil, nil, err
	}
	for {
		rec, err := r.Read()
		if err == io.EOF {
			return header, recs, lines, nil
		}
		if err != nil {
			return header, recs, lines, err
		}
		line, _ := r.FieldPos(0)
		recs = append(recs, rec)
		lines = append(lines, line)
	}
}

func colIndex(header []string, name string) int {
	for i, h := range header {
		if strings.TrimPrefix(h, "\uFEFF") == name {
			return i
		}
	}
	return -1
}

// chunkReader returns its data in reads of random length, so rows, quotes
// and CRLF pairs straddle buffer refills.
type chunkReader struct {
	data []byte
	rng  *rand.Rand
}

func (r *chunkReader) Read(p []byte) (int, error) {
	if len(r.data) == 0 {
		return 0, io.EOF
	}
	n := min(len(p), len(r.data), 1+r.rng.IntN(7))
	copy(p, r.data[:n])
	r.data = r.data[n:]
	return n, nil
}

func TestCSVReader_AgainstEncodingCSV(t *testing.T) {
	rng := newRand(t)
	for iter := range 300 {
		data, want := randomCSV(rng, rng.IntN(60))
		header, recs, lines, err := stdCSV(data)
		if err != nil {
			t.Fatalf("file %d: encoding/csv rejects the generated file: %v\n%q", iter, err, data)
		}
		if len(recs) != len(want) {
			t.Fatalf("file %d: encoding/csv reads %d rows, generator wrote %d", iter, len(recs), len(want))
		}
		var r io.Reader = bytes.NewReader(data)
		if iter%2 == 1 {
			r = &chunkReader{data: data, rng: rng}
		}
		got, err := readAllCSV(t, r)
		if err != nil {
			t.Fatalf("file %d: %v", iter, err)
		}
		if len(got) != len(want) {
			t.Fatalf("file %d: got %d rows, want %d\n%q", iter, len(got), len(want), data)
		}
		si := colIndex(header, "sensor")
		for i, g := range got {
			w := want[i]
			if g.err != nil || g.sensor != recs[i][si] || g.sensor != w.sensor || g.line != lines[i] ||
				g.rd.UnixNano != w.rd.UnixNano || math.Float64bits(g.rd.Value) != math.Float64bits(w.rd.Value) {
				t.Fatalf("file %d row %d = %v; want line %d sensor %q %d %v (encoding/csv: %q)",
					iter, i, g, lines[i], w.sensor, w.rd.UnixNano, w.rd.Value, recs[i])
			}
		}
	}
}

func TestCSVReader_NoAllocsPerRow(t *testing.T) {
	const rows = 2000
	data := typicalCSV(rows)
	cr, err := ingest.NewCSVReader(bytes.NewReader(data))
	if err != nil {
		t.Fatal(err)
	}
	cr.Next() // let the buffers grow
	allocs := testing.AllocsPerRun(rows-10, func() {
		if !cr.Next() {
			t.Fatal("ran out of rows")
		}
		if _, _, err := cr.Row(); err != nil {
			t.Fatal(err)
		}
	})
	if allocs != 0 {
		t.Errorf("CSVReader allocates %v times per row, want 0", allocs)
	}
}

// typicalCSV is a replay file of rows like the ones the plant writes.
func typicalCSV(rows int) []byte {
	var b bytes.Buffer
	b.WriteString("sensor,time,value\n")
	for i := range rows {
		fmt.Fprintf(&b, "plantA.boiler%d.pt-1%02d,%d.5,%.3f\n", i%7, i%50, 1767225600+i, 101.325+float64(i%1000)/1000)
	}
	return b.Bytes()
}

func BenchmarkCSVReader(b *testing.B) {
	const rows = 10000
	data := typicalCSV(rows)
	b.ReportAllocs()
	b.SetBytes(int64(len(data)))
	for b.Loop() {
		cr, err := ingest.NewCSVReader(bytes.NewReader(data))
		if err != nil {
			b.Fatal(err)
		}
		n := 0
		for cr.Next() {
			if _, _, err := cr.Row(); err != nil {
				b.Fatal(err)
			}
			n++
		}
		if n != rows {
			b.Fatalf("read %d rows, want %d", n, rows)
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/rows, "ns/row")
}

// BenchmarkCSVReader_EncodingCSV reads the same file with encoding/csv
// (ReuseRecord on) and the same field parsing, for comparison.
func BenchmarkCSVReader_EncodingCSV(b *testing.B) {
	const rows = 10000
	data := typicalCSV(rows)
	b.ReportAllocs()
	b.SetBytes(int64(len(data)))
	for b.Loop() {
		r := csv.NewReader(bytes.NewReader(data))
		r.ReuseRecord = true
		if _, err := r.Read(); err != nil {
			b.Fatal(err)
		}
		for {
			rec, err := r.Read()
			if err == io.EOF {
				break
			}
			if _, err := ingest.ParseTime([]byte(rec[1])); err != nil {
				b.Fatal(err)
			}
			if _, err := strconv.ParseFloat(rec[2], 64); err != nil {
				b.Fatal(err)
			}
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/rows, "ns/row")
}

func FuzzCSVReader(f *testing.F) {
	f.Add([]byte("sensor,time,value\nplantA.boiler2.pt-101,1767225600.5,101.325\n"))
	f.Add([]byte("value,sensor,time\r\n1,\"a,\"\"b\",2026-03-01T12:00:00Z\r\n\r\n2,c,1.7672256e9"))
	f.Add([]byte("sensor,time,value,x\n\"s\n\",0,1,\"\r\n\"\ns,0,NaN,\ns,\"0\"x,1,\n"))
	f.Add([]byte("sensor,time,value\ns,0,1\r"))
	f.Fuzz(func(t *testing.T, data []byte) {
		got, err := readAllCSV(t, bytes.NewReader(data))
		// Same rows when the input arrives in two pieces.
		if len(data) > 0 {
			cut := int(data[0]) % (len(data) + 1)
			split := io.MultiReader(bytes.NewReader(data[:cut]), bytes.NewReader(data[cut:]))
			got2, err2 := readAllCSV(t, iotest.HalfReader(split))
			if fmt.Sprint(err) != fmt.Sprint(err2) || fmt.Sprint(got) != fmt.Sprint(got2) {
				t.Fatalf("split at %d: %v %v, whole: %v %v", cut, got2, err2, got, err)
			}
		}
		if err != nil {
			return
		}
		header, recs, lines, stdErr := stdCSV(data)
		if header == nil {
			return
		}
		si, ti, vi := colIndex(header, "sensor"), colIndex(header, "time"), colIndex(header, "value")
		for i, rec := range recs {
			if i >= len(got) {
				t.Fatalf("encoding/csv reads row %d %q at line %d; CSVReader stopped after %d rows", i, rec, lines[i], len(got))
			}
			g := got[i]
			if g.line != lines[i] {
				t.Fatalf("row %d: CSVReader line %d, encoding/csv line %d", i, g.line, lines[i])
			}
			ns, terr := ingest.ParseTime([]byte(rec[ti]))
			v, verr := strconv.ParseFloat(rec[vi], 64)
			valid := rec[si] != "" && terr == nil && verr == nil && !math.IsNaN(v) && !math.IsInf(v, 0)
			if valid != (g.err == nil) {
				t.Fatalf("row %d %q: CSVReader gives %v, valid by encoding/csv fields: %v", i, rec, g, valid)
			}
			if valid && (g.sensor != rec[si] || g.rd.UnixNano != ns || math.Float64bits(g.rd.Value) != math.Float64bits(v)) {
				t.Fatalf("row %d: CSVReader %v, encoding/csv %q", i, g, rec)
			}
		}
		if stdErr != nil {
			var pe *csv.ParseError
			if errors.As(stdErr, &pe) && errors.Is(pe.Err, csv.ErrFieldCount) && len(recs) < len(got) {
				if !errors.Is(got[len(recs)].err, ingest.ErrFieldCount) {
					t.Fatalf("encoding/csv: %v; CSVReader row: %v", stdErr, got[len(recs)])
				}
			}
			return
		}
		if len(got) != len(recs) {
			t.Fatalf("CSVReader reads %d rows, encoding/csv %d", len(got), len(recs))
		}
	})
}
