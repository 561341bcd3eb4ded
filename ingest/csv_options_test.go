package ingest_test

import (
	"bytes"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"strconv"
	"strings"
	"testing"
	"time"
	_ "time/tzdata" // the zones below, whatever the machine has installed

	"driftfit/ingest"
)

// historianCSV writes an export as a process historian makes it: the
// given delimiter, its own column names with extra columns around them,
// wall-clock times without offset ("2026-03-29 02:30:00", some with a
// fraction or a T), ids holding the delimiter quoted.
func historianCSV(rng *rand.Rand, comma byte, rows int, start time.Time) []byte {
	var b bytes.Buffer
	d := string(comma)
	b.WriteString("Quality" + d + "Tag" + d + "Timestamp" + d + "Value" + d + "Description\r\n")
	at := start
	for i := range rows {
		// Steps of 1 to 90 minutes, so a run crosses both changes of
		// summer time when it starts a little before them.
		at = at.Add(time.Duration(1+rng.IntN(90)) * time.Minute)
		ts := at.Format("2006-01-02 15:04:05")
		switch rng.IntN(4) {
		case 0:
			ts = at.Format("2006-01-02T15:04:05")
		case 1:
			ts += "." + strconv.Itoa(rng.IntN(1000))
		}
		tag := fmt.Sprintf("qm.u%d.tt-%03d", rng.IntN(4), rng.IntN(50))
		if i%7 == 0 {
			tag = `"` + tag + d + `x"`
		}
		fmt.Fprintf(&b, "Good%s%s%s%s%s%s%s\"note %d\"\r\n", d, tag, d, ts, d, strconv.FormatFloat(rng.NormFloat64()*100, 'g', -1, 64), d, i)
	}
	return b.Bytes()
}

// TestCSVReader_Historian reads historian exports with CSVOptions and
// checks every row against the references: encoding/csv with the same
// Comma for the fields, time.ParseInLocation for the wall-clock times,
// strconv.ParseFloat for the values.
func TestCSVReader_Historian(t *testing.T) {
	const seed = 7
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	for _, tc := range []struct {
		zone  string
		comma byte
		start string // shortly before a change of summer time
	}{
		{"Europe/Berlin", ';', "2026-03-28 20:00:00"}, // CET → CEST on 2026-03-29 02:00
		{"Europe/Berlin", ';', "2026-10-24 20:00:00"}, // CEST → CET on 2026-10-25 03:00
		{"America/Chicago", '\t', "2026-03-07 20:00:00"},
		{"UTC", '|', "2026-01-01 00:00:00"},
	} {
		t.Run(tc.zone+" "+strconv.QuoteRune(rune(tc.comma)), func(t *testing.T) {
			loc, err := time.LoadLocation(tc.zone)
			if err != nil {
				t.Fatal(err)
			}
			start, _ := time.ParseInLocation(time.DateTime, tc.start, loc)
			data := historianCSV(rng, tc.comma, 300, start)

			ref := csv.NewReader(bytes.NewReader(data))
			ref.Comma = rune(tc.comma)
			header, err := ref.Read()
			if err != nil {
				t.Fatal(err)
			}
			col := map[string]int{}
			for i, h := range header {
				col[h] = i
			}
			cr, err := ingest.NewCSVReaderOptions(bytes.NewReader(data), ingest.CSVOptions{
				Sensor: "Tag", Time: "Timestamp", Value: "Value", Comma: tc.comma, Location: loc})
			if err != nil {
				t.Fatal(err)
			}
			n := 0
			for ; ; n++ {
				rec, err := ref.Read()
				if err == io.EOF {
					break
				}
				if err != nil {
					t.Fatal(err)
				}
				if !cr.Next() {
					t.Fatalf("row %d: CSVReader ended early: %v", n, cr.Err())
				}
				id, rd, err := cr.Row()
				if err != nil {
					t.Fatalf("row %d %q: %v", n, rec, err)
				}
				layout := time.DateTime
				if strings.Contains(rec[col["Timestamp"]], "T") {
					layout = "2006-01-02T15:04:05"
				}
				wantT, err := time.ParseInLocation(layout, rec[col["Timestamp"]], loc)
				if err != nil {
					t.Fatal(err)
				}
				wantV, _ := strconv.ParseFloat(rec[col["Value"]], 64)
				if string(id) != rec[col["Tag"]] || rd.UnixNano != wantT.UnixNano() || rd.Value != wantV {
					t.Errorf("row %d: %s %d %v; want %s %d (%v) %v", n, id, rd.UnixNano, rd.Value, rec[col["Tag"]], wantT.UnixNano(), wantT, wantV)
				}
			}
			if cr.Next() {
				t.Errorf("CSVReader has rows after encoding/csv's %d", n)
			}
		})
	}
}

func TestCSVReader_OptionErrors(t *testing.T) {
	for _, tc := range []struct {
		name string
		in   string
		o    ingest.CSVOptions
		want error
		text string
	}{
		{"quote delimiter", "a\"b\n", ingest.CSVOptions{Comma: '"'}, ingest.ErrDelimiter, `'"'`},
		{"line end delimiter", "a\nb\n", ingest.CSVOptions{Comma: '\n'}, ingest.ErrDelimiter, `'\n'`},
		{"mapped column missing", "Tag;Time;Value\n", ingest.CSVOptions{Sensor: "Tag", Time: "Timestamp", Comma: ';'}, ingest.ErrMissingColumn, `"Timestamp"`},
		{"default names under another delimiter", "sensor,time,value\n", ingest.CSVOptions{Comma: ';'}, ingest.ErrMissingColumn, `"sensor"`},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := ingest.NewCSVReaderOptions(strings.NewReader(tc.in), tc.o)
			if !errors.Is(err, tc.want) || !strings.Contains(err.Error(), tc.text) {
				t.Errorf("NewCSVReaderOptions = %v, want %v naming %s", err, tc.want, tc.text)
			}
		})
	}
	// Without a Location, a time without offset is a bad row naming it.
	cr, err := ingest.NewCSVReader(strings.NewReader("sensor,time,value\na,2026-03-01 12:00:00,1\n"))
	if err != nil {
		t.Fatal(err)
	}
	cr.Next()
	if _, _, err := cr.Row(); !errors.Is(err, ingest.ErrTimeSyntax) || !strings.Contains(err.Error(), `time "2026-03-01 12:00:00"`) {
		t.Errorf("local time without Location: %v, want ErrTimeSyntax naming the field", err)
	}
}
