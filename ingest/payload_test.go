package ingest_test

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"strings"
	"testing"
	"time"

	"driftfit/ingest"
	"driftfit/rolling"
)

// t2026 is 2026-03-01T12:00:00Z in Unix ns, from the standard library.
var t2026 = time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC).UnixNano()

// wantReading is an expected decoded reading; unit "" means absent.
type wantReading struct {
	ns     int64
	v      float64
	ref    float64
	hasRef bool
	unit   string
}

type wantReject struct {
	index  int
	field  string
	value  string
	reason ingest.Reason
	err    error
}

func checkPayload(t *testing.T, p ingest.Payload, sensor string, readings []wantReading, rejects []wantReject) {
	t.Helper()
	if string(p.Sensor) != sensor {
		t.Errorf("Sensor = %q, want %q", p.Sensor, sensor)
	}
	if len(p.Readings) != len(readings) {
		t.Fatalf("got %d readings %+v, want %d %+v", len(p.Readings), p.Readings, len(readings), readings)
	}
	for i, w := range readings {
		g := p.Readings[i]
		if g.UnixNano != w.ns || math.Float64bits(g.Value) != math.Float64bits(w.v) || g.HasRef != w.hasRef ||
			math.Float64bits(g.Ref) != math.Float64bits(w.ref) || string(g.Unit) != w.unit {
			t.Errorf("reading %d = {%d %v ref %v/%v unit %q}, want %+v", i, g.UnixNano, g.Value, g.Ref, g.HasRef, g.Unit, w)
		}
	}
	if len(p.Rejects) != len(rejects) {
		t.Fatalf("got %d rejects %+v, want %d %+v", len(p.Rejects), p.Rejects, len(rejects), rejects)
	}
	for i, w := range rejects {
		g := p.Rejects[i]
		if g.Index != w.index || g.Field != w.field || g.Value != w.value || g.Reason != w.reason || !errors.Is(g.Err, w.err) {
			t.Errorf("reject %d = %+v, want %+v", i, g, w)
		}
	}
}

func TestDecoder_Decode(t *testing.T) {
	r := func(ns int64, v float64) wantReading { return wantReading{ns: ns, v: v} }
	tests := []struct {
		name     string
		in       string
		sensor   string
		readings []wantReading
		rejects  []wantReject
	}{
		{"single rfc 3339", `{"t":"2026-03-01T12:00:00Z","v":101.325}`, "", []wantReading{r(t2026, 101.325)}, nil},
		{"single unix seconds with ref and unit",
			` { "unit" : "kPa", "ref": 100, "v": -1.5e-3, "t": 1772366400.25 } `, "",
			[]wantReading{{ns: t2026 + 25e7, v: -1.5e-3, ref: 100, hasRef: true, unit: "kPa"}}, nil},
		{"single with sensor", `{"sensor":"plantA.boiler2.pt-101","t":1772366400,"v":1}`, "plantA.boiler2.pt-101", []wantReading{r(t2026, 1)}, nil},
		{"time as quoted number", `{"t":"1772366400","v":1}`, "", []wantReading{r(t2026, 1)}, nil},
		{"exponent time", `{"t":1.7723664e9,"v":1}`, "", []wantReading{r(t2026, 1)}, nil},
		{"null ref and unit are absent", `{"t":1772366400,"v":1,"ref":null,"unit":null}`, "", []wantReading{r(t2026, 1)}, nil},
		{"unknown keys of every kind ignored",
			`{"q":{"a":[1,{"b":null}],"c":"\u00e9\n"},"t":1772366400,"flag":true,"n":-0.5e+3,"v":2,"z":[],"w":{}}`, "",
			[]wantReading{r(t2026, 2)}, nil},
		{"escaped keys and unit", `{"\u0074":1772366400,"\u0076":3,"un\u0069t":"\u00b0C \"dry\"\/x"}`, "",
			[]wantReading{{ns: t2026, v: 3, unit: "°C \"dry\"/x"}}, nil},
		{"surrogate pair and lone surrogate", `{"t":0,"v":0,"unit":"\ud83d\ude00\ud800"}`, "",
			[]wantReading{{ns: 0, v: 0, unit: "\U0001F600\uFFFD"}}, nil},
		{"duplicate key: last wins", `{"t":1,"v":1,"v":2,"t":1772366400}`, "", []wantReading{r(t2026, 2)}, nil},
		{"negative zero kept", `{"t":0,"v":-0}`, "", []wantReading{r(0, math.Copysign(0, -1))}, nil},
		// 1e-400 is below the smallest float64 subnormal, 4.9e-324 (IEEE
		// 754 binary64): strconv would read 0, which is not the reading.
		{"underflow refused", `{"t":0,"v":1e-400}`, "", nil, []wantReject{{0, "v", "1e-400", ingest.ReasonNonFinite, ingest.ErrNumberRange}}},
		{"smallest subnormal kept", `{"t":0,"v":5e-324}`, "", []wantReading{r(0, 5e-324)}, nil},
		{"empty array", `[]`, "", nil, nil},
		{"bad readings among good ones",
			`[{"t":1772366400,"v":1},
			  {"v":2},
			  {"t":1772366400,"v":null},
			  {"t":"yesterday","v":3},
			  {"t":1772366400.0000000001,"v":3},
			  {"t":1772366400,"v":1e999},
			  {"t":1772366400,"v":"4"},
			  {"t":true,"v":4},
			  {"t":1772366400,"v":5,"ref":-1e999},
			  {"t":1772366400,"v":5,"ref":"0"},
			  {"t":1772366400,"v":5,"unit":7},
			  42,
			  [1,2],
			  {"t":1772366401,"v":6,"unit":"bar"}]`, "",
			[]wantReading{r(t2026, 1), {ns: t2026 + 1e9, v: 6, unit: "bar"}},
			[]wantReject{
				{1, "t", "", ingest.ReasonMissingField, ingest.ErrMissingField},
				{2, "v", "", ingest.ReasonMissingField, ingest.ErrMissingField},
				{3, "t", `"yesterday"`, ingest.ReasonBadTime, ingest.ErrTimeSyntax},
				{4, "t", "1772366400.0000000001", ingest.ReasonBadTime, ingest.ErrTimePrecision},
				{5, "v", "1e999", ingest.ReasonNonFinite, ingest.ErrNonFinite},
				{6, "v", `"4"`, ingest.ReasonWrongType, ingest.ErrWrongType},
				{7, "t", "true", ingest.ReasonWrongType, ingest.ErrWrongType},
				{8, "ref", "-1e999", ingest.ReasonNonFinite, ingest.ErrNonFinite},
				{9, "ref", `"0"`, ingest.ReasonWrongType, ingest.ErrWrongType},
				{10, "unit", "7", ingest.ReasonWrongType, ingest.ErrWrongType},
				{11, "", "42", ingest.ReasonWrongType, ingest.ErrWrongType},
				{12, "", "[1,2]", ingest.ReasonWrongType, ingest.ErrWrongType},
			}},
		{"batch", `{"sensor":"s.1","t":[1772366400,"2026-03-01T12:00:01Z",1772366402],"v":[1,2.5,-3],"unit":"mA"}`, "s.1",
			[]wantReading{{ns: t2026, v: 1, unit: "mA"}, {ns: t2026 + 1e9, v: 2.5, unit: "mA"}, {ns: t2026 + 2e9, v: -3, unit: "mA"}}, nil},
		{"batch with ref and bad elements", `{"v":[1,null,3,1e999,5],"ref":[0.5,0,null,0,"x"],"t":[0,1,2,3,4],"sensor":"s"}`, "s",
			[]wantReading{{ns: 0, v: 1, ref: 0.5, hasRef: true}, {ns: 2e9, v: 3}},
			[]wantReject{
				{1, "v", "", ingest.ReasonMissingField, ingest.ErrMissingField},
				{3, "v", "1e999", ingest.ReasonNonFinite, ingest.ErrNonFinite},
				{4, "ref", `"x"`, ingest.ReasonWrongType, ingest.ErrWrongType},
			}},
		{"batch with wrong unit type", `{"t":[0,1],"v":[1,2],"unit":["x"]}`, "", nil,
			[]wantReject{
				{0, "unit", `["x"]`, ingest.ReasonWrongType, ingest.ErrWrongType},
				{1, "unit", `["x"]`, ingest.ReasonWrongType, ingest.ErrWrongType},
			}},
		// Elements that hold numbers without being plain ones: a nested
		// array, an object, exponent and long forms after a plain number.
		{"batch with nested and long elements",
			`{"t":[[1772366400],1772366400,{"a":1},1772366401,1.772366402e9],"v":[1,[2],3,12345678901234567890.5,5]}`, "",
			[]wantReading{{ns: t2026 + 1e9, v: 12345678901234567890.5}, {ns: t2026 + 2e9, v: 5}},
			[]wantReject{
				{0, "t", "[1772366400]", ingest.ReasonWrongType, ingest.ErrWrongType},
				{1, "v", "[2]", ingest.ReasonWrongType, ingest.ErrWrongType},
				{2, "t", `{"a":1}`, ingest.ReasonWrongType, ingest.ErrWrongType},
			}},
		{"empty batch", `{"sensor":"s","t":[],"v":[]}`, "s", nil, nil},
		{"long bad value cut", `{"t":"` + strings.Repeat("x", 100) + `","v":1}`, "", nil,
			[]wantReject{{0, "t", `"` + strings.Repeat("x", 63) + "...", ingest.ReasonBadTime, ingest.ErrTimeSyntax}}},
	}
	var d ingest.Decoder // shared: reuse across payloads must not leak state
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			p, err := d.Decode([]byte(tt.in))
			if err != nil {
				t.Fatalf("Decode(%s) error: %v", tt.in, err)
			}
			checkPayload(t, p, tt.sensor, tt.readings, tt.rejects)
		})
	}
}

func TestDecoder_Decode_PayloadErrors(t *testing.T) {
	tests := []struct {
		name   string
		in     string
		err    error
		reason ingest.Reason
		offset int
	}{
		{"empty", ``, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 0},
		{"white space only", " \n", ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 2},
		{"truncated", `{"t":1,"v":`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 11},
		{"trailing comma", `{"t":1,"v":2,}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 13},
		{"trailing data", `{"t":1,"v":2} {}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 14},
		{"single quotes", `{'t':1,'v':2}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 1},
		{"leading zero", `{"t":01,"v":2}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 6},
		{"leading plus", `{"t":1,"v":+2}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 11},
		{"bare NaN", `{"t":1,"v":NaN}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 11},
		{"trailing dot", `{"t":1,"v":2.}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 13},
		{"bad escape", `{"t":1,"v":2,"x":"\q"}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 18},
		{"short unicode escape", `{"t":1,"v":2,"x":"\u12"}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 18},
		{"raw newline in string", "{\"t\":1,\"v\":2,\"x\":\"a\nb\"}", ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 19},
		{"broken unknown value", `{"t":1,"v":2,"x":[1,}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 20},
		{"bad literal", `{"t":1,"v":2,"x":nul}`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 17},
		{"unterminated string", `{"t":1,"v":2,"x":"abc`, ingest.ErrPayloadSyntax, ingest.ReasonMalformed, 21},
		{"scalar payload", `42`, ingest.ErrPayloadShape, ingest.ReasonMalformed, 0},
		{"null payload", `null`, ingest.ErrPayloadShape, ingest.ReasonMalformed, 0},
		{"batch with scalar v", `{"t":[1,2],"v":3}`, ingest.ErrPayloadShape, ingest.ReasonMalformed, 15},
		{"batch without t", `{"v":[3]}`, ingest.ErrPayloadShape, ingest.ReasonMalformed, 5},
		{"batch with scalar ref", `{"t":[1],"v":[3],"ref":0}`, ingest.ErrPayloadShape, ingest.ReasonMalformed, 23},
		{"sensor not a string", `{"sensor":7,"t":1,"v":3}`, ingest.ErrPayloadShape, ingest.ReasonWrongType, 10},
		{"nested too deep", `{"t":1,"v":2,"x":` + strings.Repeat("[", 100) + strings.Repeat("]", 100) + `}`,
			ingest.ErrPayloadShape, ingest.ReasonMalformed, 17 + 63},
		{"length mismatch", `{"t":[1,2,3],"v":[1,2]}`, ingest.ErrLengthMismatch, ingest.ReasonLengthMismatch, 5},
		{"ref length mismatch", `{"t":[1,2],"v":[1,2],"ref":[1,2,3]}`, ingest.ErrLengthMismatch, ingest.ReasonLengthMismatch, 5},
	}
	var d ingest.Decoder
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			p, err := d.Decode([]byte(tt.in))
			var pe *ingest.PayloadError
			if !errors.As(err, &pe) || !errors.Is(err, tt.err) || pe.Reason != tt.reason || pe.Offset != tt.offset {
				t.Fatalf("Decode(%q) = %v; want *PayloadError %v, reason %v, offset %d", tt.in, err, tt.err, tt.reason, tt.offset)
			}
			if len(p.Readings)+len(p.Rejects) != 0 || p.Sensor != nil {
				t.Errorf("Decode(%q) returned readings with error %v", tt.in, err)
			}
		})
	}
}

func TestDecoder_MaxBytes(t *testing.T) {
	payload := []byte(`{"t":0,"v":1}`) // 13 bytes
	tests := []struct {
		max int
		ok  bool
	}{{0, true}, {-5, true}, {13, true}, {12, false}}
	for _, tt := range tests {
		d := ingest.Decoder{MaxBytes: tt.max}
		_, err := d.Decode(payload)
		if (err == nil) != tt.ok || (err != nil && !errors.Is(err, ingest.ErrPayloadTooLarge)) {
			t.Errorf("MaxBytes %d: Decode(13 bytes) error = %v, want ok %v", tt.max, err, tt.ok)
		}
	}
	var d ingest.Decoder
	big := append([]byte(`{"t":0,"v":1,"x":"`), bytes.Repeat([]byte("a"), ingest.DefaultMaxBytes)...)
	big = append(big, `"}`...)
	var pe *ingest.PayloadError
	if _, err := d.Decode(big); !errors.As(err, &pe) || pe.Reason != ingest.ReasonOversized {
		t.Errorf("Decode(over 1 MiB) = %v, want an oversized *PayloadError", err)
	}
}

func TestReason_String(t *testing.T) {
	want := map[ingest.Reason]string{
		ingest.ReasonUnknown: "unknown", ingest.ReasonMalformed: "malformed_payload",
		ingest.ReasonMissingField: "missing_field", ingest.ReasonBadTime: "bad_time",
		ingest.ReasonNonFinite: "non_finite", ingest.ReasonWrongType: "wrong_type",
		ingest.ReasonOversized: "oversized", ingest.ReasonFutureTime: "future_time",
		ingest.ReasonTooOld: "too_old", ingest.ReasonUnitMismatch: "unit_mismatch",
		ingest.ReasonLengthMismatch: "length_mismatch", ingest.Reason(200): "reason(200)",
	}
	for r, w := range want {
		if got := r.String(); got != w {
			t.Errorf("Reason(%d).String() = %q, want %q", uint8(r), got, w)
		}
	}
}

func TestAppendReading(t *testing.T) {
	tests := []struct {
		d    ingest.Decoded
		want string
	}{
		{ingest.Decoded{Reading: rolling.Reading{UnixNano: t2026 + 5e8, Value: 101.325}},
			`{"t":1772366400.5,"v":101.325}`},
		{ingest.Decoded{Reading: rolling.Reading{UnixNano: -1, Value: 1e21}, Ref: -0.5, HasRef: true, Unit: []byte("°C \"x\"\n")},
			`{"t":-0.000000001,"v":1e+21,"ref":-0.5,"unit":"°C \"x\"\u000a"}`},
		{ingest.Decoded{Reading: rolling.Reading{UnixNano: math.MinInt64, Value: math.Inf(-1)}},
			`{"t":-9223372036.854775808,"v":-1e999}`},
		{ingest.Decoded{Reading: rolling.Reading{UnixNano: 0, Value: math.NaN()}}, `{"t":0,"v":null}`},
	}
	for _, tt := range tests {
		if got := string(ingest.AppendReading(nil, tt.d)); got != tt.want {
			t.Errorf("AppendReading(%+v) = %s, want %s", tt.d, got, tt.want)
		}
	}
	got := string(ingest.AppendBatch([]byte("x"), "a\"b", []rolling.Reading{{UnixNano: 1, Value: 2}, {UnixNano: 3e9, Value: -0.25}}))
	if want := `x{"sensor":"a\"b","t":[0.000000001,3],"v":[2,-0.25]}`; got != want {
		t.Errorf("AppendBatch = %s, want %s", got, want)
	}
}

func Example() {
	var d ingest.Decoder
	p, err := d.Decode([]byte(`[{"t":"2026-03-01T12:00:00Z","v":101.3,"unit":"kPa"},{"t":"noon","v":99}]`))
	if err != nil {
		fmt.Println(err)
		return
	}
	for _, r := range p.Readings {
		fmt.Println(time.Unix(0, r.UnixNano).UTC().Format(time.RFC3339), r.Value, string(r.Unit))
	}
	for _, rj := range p.Rejects {
		fmt.Println(rj.Index, rj.Field, rj.Value, rj.Reason)
	}
	// Output:
	// 2026-03-01T12:00:00Z 101.3 kPa
	// 1 t "noon" bad_time
}
