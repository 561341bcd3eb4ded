package ingest_test

import (
	"bytes"
	"encoding/json"
	"errors"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"
	"unicode/utf8"

	"driftfit/ingest"
	"driftfit/rolling"
)

// expectFromJSON derives what Decode must return from encoding/json's
// generic decoding of data (UseNumber keeps numbers as written). parseTime
// is the time oracle for t. ok is false when encoding/json rejects data or
// the payload is not a reading or batch.
func expectFromJSON(data []byte, parseTime func(string) (int64, bool)) (sensor string, rs []wantReading, rjs []wantReject, ok bool) {
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.UseNumber()
	var top any
	if err := dec.Decode(&top); err != nil || dec.More() {
		return "", nil, nil, false
	}
	reading := func(idx int, m map[string]any) {
		rej := func(field string, r ingest.Reason) {
			rjs = append(rjs, wantReject{index: idx, field: field, reason: r})
		}
		var w wantReading
		switch t := m["t"].(type) {
		case nil:
			rej("t", ingest.ReasonMissingField)
			return
		case string, json.Number:
			var s string
			if n, isNum := t.(json.Number); isNum {
				s = string(n)
			} else {
				s = t.(string)
			}
			ns, ok := parseTime(s)
			if !ok {
				rej("t", ingest.ReasonBadTime)
				return
			}
			w.ns = ns
		default:
			rej("t", ingest.ReasonWrongType)
			return
		}
		num := func(field string, x any) (float64, bool) {
			n, isNum := x.(json.Number)
			if !isNum {
				rej(field, ingest.ReasonWrongType)
				return 0, false
			}
			var f float64
			if err := json.Unmarshal([]byte(n), &f); err != nil { // only overflow reaches here
				rej(field, ingest.ReasonNonFinite)
				return 0, false
			}
			return f, true
		}
		if m["v"] == nil {
			rej("v", ingest.ReasonMissingField)
			return
		}
		var okV bool
		if w.v, okV = num("v", m["v"]); !okV {
			return
		}
		if m["ref"] != nil {
			var okR bool
			if w.ref, okR = num("ref", m["ref"]); !okR {
				return
			}
			w.hasRef = true
		}
		switch u := m["unit"].(type) {
		case nil:
		case string:
			w.unit = u
		default:
			rej("unit", ingest.ReasonWrongType)
			return
		}
		rs = append(rs, w)
	}
	switch top := top.(type) {
	case []any:
		for i, e := range top {
			if m, isObj := e.(map[string]any); isObj {
				reading(i, m)
			} else {
				rjs = append(rjs, wantReject{index: i, reason: ingest.ReasonWrongType})
			}
		}
	case map[string]any:
		switch s := top["sensor"].(type) {
		case nil:
		case string:
			sensor = s
		default:
			return "", nil, nil, false
		}
		ts, tArr := top["t"].([]any)
		vs, vArr := top["v"].([]any)
		if !tArr && !vArr {
			reading(0, top)
			break
		}
		refs, refArr := top["ref"].([]any)
		if !tArr || !vArr || len(ts) != len(vs) || (top["ref"] != nil && (!refArr || len(refs) != len(ts))) {
			return "", nil, nil, false
		}
		for i := range ts {
			m := map[string]any{"t": ts[i], "v": vs[i], "unit": top["unit"]}
			if refArr {
				m["ref"] = refs[i]
			}
			reading(i, m)
		}
	default:
		return "", nil, nil, false
	}
	return sensor, rs, rjs, true
}

// refTime is the independent time oracle: big.Rat for numbers, time.Parse
// for RFC 3339.
func refTime(s string) (int64, bool) {
	if unixNumber.MatchString(s) {
		ns, exact, fits := refUnixSeconds(s)
		return ns, exact && fits
	}
	return refRFC3339(s)
}

// jsonGen writes random payloads as text, with random white space, key
// order, unknown keys, escapes and some bad readings.
type jsonGen struct {
	rng *rand.Rand
	b   []byte
}

func (g *jsonGen) ws() {
	for g.rng.IntN(4) == 0 {
		g.b = append(g.b, " \t\n\r"[g.rng.IntN(4)])
	}
}

func (g *jsonGen) str(s string) {
	if g.rng.IntN(2) == 0 {
		enc, _ := json.Marshal(s) // escapes <, >, & and invalid UTF-8 as \u sequences
		g.b = append(g.b, enc...)
		return
	}
	g.b = append(g.b, '"')
	for _, r := range s { // escape every rune, surrogate pairs above the BMP
		if r >= 0x10000 {
			r -= 0x10000
			g.b = append(g.b, `\u`+strconv.FormatInt(0xD800+int64(r>>10), 16)+`\u`+strconv.FormatInt(0xDC00+int64(r&0x3FF), 16)...)
			continue
		}
		g.b = append(g.b, `\u`+strings.Repeat("0", 4-len(strconv.FormatInt(int64(r), 16)))+strconv.FormatInt(int64(r), 16)...)
	}
	g.b = append(g.b, '"')
}

func (g *jsonGen) time() {
	ns := int64(g.rng.Uint64N(uint64(200*365*86400e9))) - 100*365*86400e9
	switch g.rng.IntN(20) {
	case 0:
		g.str("noon")
	case 1:
		g.b = append(g.b, "true"...)
	case 2, 3, 4, 5, 6, 7, 8, 9:
		off := (g.rng.IntN(24*60*2-1) - (24*60 - 1)) * 60
		g.str(time.Unix(0, ns).In(time.FixedZone("", off)).Format(time.RFC3339Nano))
	case 10, 11:
		g.str(formatSeconds(g.rng, ns))
	default:
		g.b = append(g.b, formatSeconds(g.rng, ns)...)
	}
}

func (g *jsonGen) number() {
	switch g.rng.IntN(40) {
	case 0:
		g.b = append(g.b, "1e999"...)
		return
	case 1:
		g.b = append(g.b, `"1.5"`...)
		return
	case 2:
		g.b = append(g.b, "-0"...)
		return
	}
	v := g.rng.NormFloat64() * math.Pow(10, float64(g.rng.IntN(40)-20))
	g.b = strconv.AppendFloat(g.b, v, "gef"[g.rng.IntN(3)], -1, 64)
}

// any writes a random JSON value for unknown keys.
func (g *jsonGen) any(depth int) {
	switch k := g.rng.IntN(8); {
	case k == 0 && depth < 4:
		g.b = append(g.b, '[')
		for i := range g.rng.IntN(4) {
			if i > 0 {
				g.b = append(g.b, ',')
			}
			g.ws()
			g.any(depth + 1)
			g.ws()
		}
		g.b = append(g.b, ']')
	case k == 1 && depth < 4:
		g.b = append(g.b, '{')
		for i := range g.rng.IntN(4) {
			if i > 0 {
				g.b = append(g.b, ',')
			}
			g.str([]string{"t", "v", "x", "unit"}[g.rng.IntN(4)])
			g.b = append(g.b, ':')
			g.any(depth + 1)
		}
		g.b = append(g.b, '}')
	case k == 2:
		g.b = append(g.b, []string{"true", "false", "null"}[g.rng.IntN(3)]...)
	case k == 3:
		g.str("é\u2028<&>\x01\"\\/ \U0001F600")
	default:
		g.number()
	}
}

type member struct {
	key   string
	value func()
}

func (g *jsonGen) object(ms []member) {
	if g.rng.IntN(10) == 0 && len(ms) > 0 { // a repeated key: the last one counts
		ms = append([]member{{ms[0].key, func() { g.b = append(g.b, `"stale"`...) }}}, ms...)
	}
	for range g.rng.IntN(3) {
		ms = append(ms, member{[]string{"q", "note", "T", "V", "sensors"}[g.rng.IntN(5)], func() { g.any(0) }})
	}
	g.rng.Shuffle(len(ms), func(i, j int) {
		if ms[i].key != ms[j].key { // keep repeated keys in order
			ms[i], ms[j] = ms[j], ms[i]
		}
	})
	g.b = append(g.b, '{')
	for i, m := range ms {
		if i > 0 {
			g.b = append(g.b, ',')
		}
		g.ws()
		g.str(m.key)
		g.ws()
		g.b = append(g.b, ':')
		g.ws()
		m.value()
		g.ws()
	}
	g.b = append(g.b, '}')
}

func (g *jsonGen) readingObject(sensor bool) {
	var ms []member
	if g.rng.IntN(12) != 0 {
		ms = append(ms, member{"t", g.time})
	}
	if g.rng.IntN(12) != 0 {
		ms = append(ms, member{"v", g.number})
	}
	if g.rng.IntN(3) == 0 {
		ms = append(ms, member{"ref", g.number})
	}
	if g.rng.IntN(3) == 0 {
		ms = append(ms, member{"unit", func() { g.str([]string{"kPa", "°C", "m³/h", "\"%\""}[g.rng.IntN(4)]) }})
	}
	if sensor {
		ms = append(ms, member{"sensor", func() { g.str("plantC.line1.ft-7") }})
	}
	g.object(ms)
}

func (g *jsonGen) payload() []byte {
	g.b = g.b[:0]
	g.ws()
	switch g.rng.IntN(3) {
	case 0:
		g.readingObject(g.rng.IntN(2) == 0)
	case 1:
		g.b = append(g.b, '[')
		for i := range g.rng.IntN(20) {
			if i > 0 {
				g.b = append(g.b, ',')
			}
			g.ws()
			if g.rng.IntN(15) == 0 {
				g.any(0)
			} else {
				g.readingObject(false)
			}
			g.ws()
		}
		g.b = append(g.b, ']')
	case 2:
		n := g.rng.IntN(20)
		arr := func(elem func()) func() {
			return func() {
				g.b = append(g.b, '[')
				for i := range n {
					if i > 0 {
						g.b = append(g.b, ',')
					}
					g.ws()
					if g.rng.IntN(20) == 0 {
						g.b = append(g.b, "null"...)
					} else {
						elem()
					}
				}
				g.b = append(g.b, ']')
			}
		}
		ms := []member{{"sensor", func() { g.str("plantC.line1.ft-7") }}, {"t", arr(g.time)}, {"v", arr(g.number)}}
		if g.rng.IntN(2) == 0 {
			ms = append(ms, member{"ref", arr(g.number)})
		}
		if g.rng.IntN(2) == 0 {
			ms = append(ms, member{"unit", func() { g.str("kPa") }})
		}
		g.object(ms)
	}
	g.ws()
	return g.b
}

func TestDecoder_AgainstEncodingJSON(t *testing.T) {
	rng := newRand(t)
	g := &jsonGen{rng: rng}
	var d ingest.Decoder
	var nReadings, nRejects int
	for iter := range 5000 {
		data := g.payload()
		sensor, want, wantRj, ok := expectFromJSON(data, refTime)
		if !ok {
			t.Fatalf("payload %d: encoding/json rejects the generated payload %s", iter, data)
		}
		p, err := d.Decode(data)
		if err != nil {
			t.Fatalf("payload %d: Decode(%s): %v", iter, data, err)
		}
		// Reject values are not derived independently; compare the rest.
		for i := range p.Rejects {
			if i < len(wantRj) {
				wantRj[i].value = p.Rejects[i].Value
				wantRj[i].err = p.Rejects[i].Err
			}
		}
		func() {
			defer func() { // also runs when checkPayload stops the test
				if t.Failed() {
					t.Logf("payload %d: %s", iter, data)
				}
			}()
			checkPayload(t, p, sensor, want, wantRj)
		}()
		if t.Failed() {
			return
		}
		nReadings += len(p.Readings)
		nRejects += len(p.Rejects)
	}
	t.Logf("%d readings and %d rejects agreed with encoding/json", nReadings, nRejects)
}

func TestDecoder_NoAllocsPerReading(t *testing.T) {
	for _, n := range []int{1, 100} {
		data := benchPayload(n)
		var d ingest.Decoder
		if _, err := d.Decode(data); err != nil { // grow the decoder's slices
			t.Fatal(err)
		}
		allocs := testing.AllocsPerRun(200, func() {
			p, err := d.Decode(data)
			if err != nil || len(p.Readings) != n {
				t.Fatalf("Decode: %d readings, %v", len(p.Readings), err)
			}
		})
		if allocs != 0 {
			t.Errorf("Decode(batch of %d) allocates %v times, want 0", n, allocs)
		}
	}
}

func TestAppendReading_NoAllocs(t *testing.T) {
	d := ingest.Decoded{Reading: rolling.Reading{UnixNano: t2026 + 123456789, Value: 101.325}, Ref: 101, HasRef: true, Unit: []byte("kPa")}
	buf := make([]byte, 0, 256)
	allocs := testing.AllocsPerRun(100, func() { buf = ingest.AppendReading(buf[:0], d) })
	if allocs != 0 {
		t.Errorf("AppendReading into a large enough buffer allocates %v times, want 0", allocs)
	}
}

// benchPayload is an array of n readings of about 70 bytes each, the size
// quoted for the bus measurements.
func benchPayload(n int) []byte {
	b := []byte{'['}
	t0 := time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)
	for i := range n {
		if i > 0 {
			b = append(b, ',')
		}
		b = append(b, `{"t":"`...)
		b = t0.Add(time.Duration(i)*250*time.Millisecond).AppendFormat(b, "2006-01-02T15:04:05.000Z07:00")
		b = append(b, `","v":`...)
		b = strconv.AppendFloat(b, 101.325+float64(i%97)*0.00137, 'f', -1, 64)
		b = append(b, `,"unit":"kPa"}`...)
	}
	if n == 1 {
		return b[1:]
	}
	return append(b, ']')
}

func BenchmarkDecodePayload(b *testing.B) {
	for _, n := range []int{1, 100} {
		data := benchPayload(n)
		b.Run("batch="+strconv.Itoa(n), func(b *testing.B) {
			var d ingest.Decoder
			b.ReportAllocs()
			b.SetBytes(int64(len(data)))
			for b.Loop() {
				if p, err := d.Decode(data); err != nil || len(p.Readings) != n {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(n), "ns/reading")
		})
	}
	rs := make([]rolling.Reading, 100)
	for i := range rs {
		rs[i] = rolling.Reading{UnixNano: t2026 + int64(i)*25e7, Value: 101.325 + float64(i%97)*0.00137}
	}
	short := ingest.AppendBatch(nil, "plantA.boiler2.pt-101", rs)
	// A float64 computed by the producer (scaled from raw counts, say) is
	// printed in full: 16 or 17 digits.
	for i := range rs {
		rs[i].Value = 101.325 + float64(i%97)*0.00137*math.Pi
	}
	full := ingest.AppendBatch(nil, "plantA.boiler2.pt-101", rs)
	for _, c := range []struct {
		name string
		data []byte
	}{{"columnar=100", short}, {"columnar=100,full", full}} {
		b.Run(c.name, func(b *testing.B) {
			var d ingest.Decoder
			b.ReportAllocs()
			b.SetBytes(int64(len(c.data)))
			for b.Loop() {
				if p, err := d.Decode(c.data); err != nil || len(p.Readings) != len(rs) {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(len(rs)), "ns/reading")
		})
	}
}

// jsonReading is how the payload would be decoded with encoding/json; the
// time still goes through ParseTime so both do the same work.
type jsonReading struct {
	T    json.RawMessage `json:"t"`
	V    *float64        `json:"v"`
	Ref  *float64        `json:"ref"`
	Unit string          `json:"unit"`
}

func BenchmarkDecodePayload_EncodingJSON(b *testing.B) {
	for _, n := range []int{1, 100} {
		data := benchPayload(n)
		b.Run("batch="+strconv.Itoa(n), func(b *testing.B) {
			b.ReportAllocs()
			b.SetBytes(int64(len(data)))
			var many []jsonReading
			for b.Loop() {
				var err error
				if n == 1 {
					var one jsonReading
					err = json.Unmarshal(data, &one)
					many = append(many[:0], one)
				} else {
					many = many[:0]
					err = json.Unmarshal(data, &many)
				}
				if err != nil || len(many) != n {
					b.Fatal(err)
				}
				for _, r := range many {
					if _, err := ingest.ParseTime(bytes.Trim(r.T, `"`)); err != nil || r.V == nil {
						b.Fatal(err)
					}
				}
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(n), "ns/reading")
		})
	}
}

// maxNesting is an upper bound on the nesting depth of data.
func maxNesting(data []byte) int {
	return bytes.Count(data, []byte("[")) + bytes.Count(data, []byte("{"))
}

func FuzzDecodePayload(f *testing.F) {
	seeds, err := filepath.Glob("testdata/payloads/*.json")
	if err != nil || len(seeds) == 0 {
		f.Fatalf("no seed payloads in testdata/payloads: %v", err)
	}
	for _, name := range seeds {
		data, err := os.ReadFile(name)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(data)
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		var d ingest.Decoder
		p, err := d.Decode(data)
		valid := json.Valid(data)
		if err != nil {
			var pe *ingest.PayloadError
			if !errors.As(err, &pe) || pe.Reason == ingest.ReasonUnknown {
				t.Fatalf("Decode error %v is not a classified *PayloadError", err)
			}
			// Decode calls exactly the invalid JSON a syntax error.
			if valid == errors.Is(err, ingest.ErrPayloadSyntax) && maxNesting(data) <= 64 {
				t.Fatalf("json.Valid = %v, Decode error %v", valid, err)
			}
			return
		}
		if !valid {
			t.Fatalf("Decode accepted invalid JSON %q", data)
		}
		// Same readings as encoding/json, with ParseTime as the time
		// oracle (FuzzParseTime checks it against the standard library).
		oracle := func(s string) (int64, bool) {
			ns, err := ingest.ParseTime([]byte(s))
			return ns, err == nil
		}
		if sensor, want, wantRj, ok := expectFromJSON(data, oracle); ok && utf8.Valid(data) {
			if len(want) != len(p.Readings) || len(wantRj) != len(p.Rejects) || sensor != string(p.Sensor) {
				t.Fatalf("Decode: %d readings %d rejects sensor %q; encoding/json: %d, %d, %q",
					len(p.Readings), len(p.Rejects), p.Sensor, len(want), len(wantRj), sensor)
			}
			for i := range wantRj {
				wantRj[i].value, wantRj[i].err = p.Rejects[i].Value, p.Rejects[i].Err
			}
			checkPayload(t, p, sensor, want, wantRj)
		}
		got := append([]ingest.Decoded(nil), p.Readings...)
		for i := range got {
			got[i].Unit = bytes.Clone(got[i].Unit)
		}
		// Every accepted reading re-encodes and decodes bit for bit.
		var d2 ingest.Decoder
		for i, r := range got {
			enc := ingest.AppendReading(nil, r)
			q, err := d2.Decode(enc)
			if err != nil || len(q.Readings) != 1 || !sameDecoded(q.Readings[0], r) {
				t.Fatalf("reading %d %+v: re-encoded %s decodes to %+v, %v", i, r, enc, q.Readings, err)
			}
		}
		// Split in two: each half, re-encoded as an array, decodes to its
		// part of the readings; the plain readings survive a batch.
		k := len(got) / 2
		for _, part := range [][]ingest.Decoded{got[:k], got[k:]} {
			enc := []byte{'['}
			for i, r := range part {
				if i > 0 {
					enc = append(enc, ',')
				}
				enc = ingest.AppendReading(enc, r)
			}
			enc = append(enc, ']')
			q, err := d2.Decode(enc)
			if err != nil || len(q.Readings) != len(part) {
				t.Fatalf("half %s: %d readings, %v; want %d", enc, len(q.Readings), err, len(part))
			}
			for i := range part {
				if !sameDecoded(q.Readings[i], part[i]) {
					t.Fatalf("half reading %d = %+v, want %+v", i, q.Readings[i], part[i])
				}
			}
		}
		plain := make([]rolling.Reading, len(got))
		for i, r := range got {
			plain[i] = r.Reading
		}
		q, err := d2.Decode(ingest.AppendBatch(nil, string(p.Sensor), plain))
		if err != nil || len(q.Readings) != len(plain) || string(q.Sensor) != string(p.Sensor) {
			t.Fatalf("batch round trip: %d readings, sensor %q, %v", len(q.Readings), q.Sensor, err)
		}
		for i := range plain {
			if q.Readings[i].UnixNano != plain[i].UnixNano || math.Float64bits(q.Readings[i].Value) != math.Float64bits(plain[i].Value) {
				t.Fatalf("batch reading %d = %+v, want %+v", i, q.Readings[i].Reading, plain[i])
			}
		}
	})
}

func sameDecoded(a, b ingest.Decoded) bool {
	return a.UnixNano == b.UnixNano && math.Float64bits(a.Value) == math.Float64bits(b.Value) &&
		a.HasRef == b.HasRef && math.Float64bits(a.Ref) == math.Float64bits(b.Ref) && bytes.Equal(a.Unit, b.Unit)
}
