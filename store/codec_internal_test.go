package store

import (
	"bytes"
	"cmp"
	"encoding/hex"
	"flag"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"slices"
	"strings"
	"testing"
	"time"

	"driftfit/rolling"
)

var update = flag.Bool("update", false, "rewrite testdata golden files")

// TestAppendInt_Order checks that byte order of the key encoding is the
// numeric order, against cmp.Compare from the Go standard library.
func TestAppendInt_Order(t *testing.T) {
	const seed = 1
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, seed))
	vals := []int64{math.MinInt64, math.MinInt64 + 1, -1 << 32, -2, -1, 0, 1, 2, 1 << 32, math.MaxInt64 - 1, math.MaxInt64}
	for range 2000 {
		vals = append(vals, int64(rng.Uint64()), rng.Int64N(1000)-500)
	}
	for _, a := range vals {
		ka := appendInt(nil, a)
		if got := readInt(ka); got != a {
			t.Fatalf("readInt(appendInt(%d)) = %d", a, got)
		}
		for _, b := range vals[:40] {
			if got, want := bytes.Compare(ka, appendInt(nil, b)), cmp.Compare(a, b); got != want {
				t.Fatalf("bytes.Compare(key(%d), key(%d)) = %d, want %d", a, b, got, want)
			}
		}
	}
}

// TestPaneKey_Order checks that pane keys of several sensors sort by
// sensor, then width, then index, as Restore needs.
func TestPaneKey_Order(t *testing.T) {
	const seed = 2
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, seed))
	type pk struct {
		id  string
		key rolling.PaneKey
	}
	ids := []string{"a", "a.b", "a-", "a\x01", "b", "ab"}
	widths := []time.Duration{time.Hour, 24 * time.Hour, time.Minute}
	var keys []pk
	for range 3000 {
		keys = append(keys, pk{ids[rng.IntN(len(ids))], rolling.PaneKey{Width: widths[rng.IntN(3)], Index: rng.Int64N(1<<20) - 1<<19}})
	}
	byBytes := slices.Clone(keys)
	slices.SortFunc(byBytes, func(a, b pk) int {
		return bytes.Compare(appendPaneKey(nil, a.id, a.key), appendPaneKey(nil, b.id, b.key))
	})
	byFields := slices.Clone(keys)
	slices.SortFunc(byFields, func(a, b pk) int {
		return cmp.Or(strings.Compare(a.id, b.id), cmp.Compare(a.key.Width, b.key.Width), cmp.Compare(a.key.Index, b.key.Index))
	})
	for i := range keys {
		if byBytes[i] != byFields[i] {
			t.Fatalf("position %d: by bytes %+v, by fields %+v", i, byBytes[i], byFields[i])
		}
		id, key, err := splitPaneKey(appendPaneKey(nil, byBytes[i].id, byBytes[i].key))
		if err != nil || string(id) != byBytes[i].id || key != byBytes[i].key {
			t.Fatalf("splitPaneKey round trip of %+v: %q %+v %v", byBytes[i], id, key, err)
		}
	}
}

// sampleSolutions returns solutions of real fits covering the encoder's
// cases: not enough data, no time spread, constant values, two instants
// (parabola singular), mixed signs (exp excluding readings), and
// ordinary drifting data.
func sampleSolutions(t testing.TB) []rolling.Solution {
	specs := []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}}
	base := time.Date(2030, 5, 17, 0, 0, 0, 0, time.UTC).UnixNano()
	cases := [][]rolling.Reading{
		{{UnixNano: base, Value: 3}},
		{{UnixNano: base, Value: 3}, {UnixNano: base, Value: 4}, {UnixNano: base, Value: 5}},
		{{UnixNano: base, Value: 2}, {UnixNano: base + 6e11, Value: 2}, {UnixNano: base + 9e11, Value: 2}, {UnixNano: base + 3e12, Value: 2}},
		{{UnixNano: base, Value: 1}, {UnixNano: base, Value: 2}, {UnixNano: base + 6e11, Value: 3}, {UnixNano: base + 6e11, Value: 5}},
	}
	rng := rand.New(rand.NewPCG(3, 3))
	var drift, mixed, exact []rolling.Reading
	for i := range 300 {
		tt := base + int64(i)*int64(4*time.Minute)
		drift = append(drift, rolling.Reading{UnixNano: tt, Value: 50 + 1e-3*float64(i) + 0.01*rng.NormFloat64()})
		mixed = append(mixed, rolling.Reading{UnixNano: tt, Value: math.Sin(float64(i) / 20)})
		// On a line to rounding: residuals below resolution.
		exact = append(exact, rolling.Reading{UnixNano: tt, Value: 50 + 1e-3*float64(i)})
	}
	cases = append(cases, drift, mixed, exact)
	var out []rolling.Solution
	for _, rs := range cases {
		s, err := rolling.NewSensor(specs...)
		if err != nil {
			t.Fatal(err)
		}
		for _, r := range rs {
			if err := s.Add(r); err != nil {
				t.Fatal(err)
			}
		}
		out = append(out, s.Solve(0))
	}
	return out
}

// goldenSolutions are fixed by hand, not computed, so the golden file
// pins the layout and nothing of rolling's arithmetic.
func goldenSolutions() []rolling.Solution {
	first := time.Unix(0, 1_900_000_000_000_000_000)
	last := first.Add(23 * time.Hour)
	ws := rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour}
	empty := rolling.Solution{Window: ws, Panes: 24, Filled: 1, N: 1, First: first, Last: first}
	for _, f := range []*rolling.Fit{&empty.Line, &empty.Parabola, &empty.Exp} {
		f.Err, f.N, f.First, f.Last = rolling.ErrNotEnoughData, 1, first, first
	}
	empty.Line.Model, empty.Parabola.Model, empty.Exp.Model = rolling.Line, rolling.Parabola, rolling.Exp
	full := rolling.Solution{Window: ws, Panes: 24, Filled: 24, N: 96, First: first, Last: last}
	full.Line = rolling.Fit{Model: rolling.Line, N: 96, First: first, Last: last,
		Coef: [3]float64{10.5, -0.25}, SE: [3]float64{0.125, 0.0625},
		CI:      [3][2]float64{{10.25, 10.75}, {-0.375, -0.125}},
		Cov:     [3][3]float64{{1.0 / 64, -1.0 / 256}, {-1.0 / 256, 1.0 / 256}},
		ResidSD: 0.5, R2: 0.75, DF: 94, TCrit: 1.98552344, Cond: 3, PosDef: true}
	full.Parabola = full.Line
	full.Parabola.Model, full.Parabola.DF, full.Parabola.Err = rolling.Parabola, 93, rolling.ErrConstant
	full.Parabola.Coef[2], full.Parabola.Cov[2][2] = math.Copysign(0, -1), 1e-300
	full.Exp = rolling.Fit{Model: rolling.Exp, Err: rolling.ErrSingular, N: 90, Excluded: 6, First: first.Add(time.Hour), Last: last}
	return []rolling.Solution{empty, full}
}

func sameFitBits(a, b *rolling.Fit) bool {
	if a.Model != b.Model || a.Err != b.Err || a.N != b.N || a.Excluded != b.Excluded || a.DF != b.DF ||
		a.PosDef != b.PosDef || a.First != b.First || a.Last != b.Last ||
		a.Pairs != b.Pairs || a.SerialErr != b.SerialErr {
		return false
	}
	for _, v := range [][2]float64{{a.NEff, b.NEff}, {a.Inflation, b.Inflation}, {a.TCritAdj, b.TCritAdj}} {
		if math.Float64bits(v[0]) != math.Float64bits(v[1]) {
			return false
		}
	}
	for i := range 3 {
		if math.Float64bits(a.SEAdj[i]) != math.Float64bits(b.SEAdj[i]) ||
			math.Float64bits(a.CIAdj[i][0]) != math.Float64bits(b.CIAdj[i][0]) ||
			math.Float64bits(a.CIAdj[i][1]) != math.Float64bits(b.CIAdj[i][1]) {
			return false
		}
	}
	pa, pb := fitFloatPtrs(a), fitFloatPtrs(b)
	for i := range pa {
		if math.Float64bits(*pa[i]) != math.Float64bits(*pb[i]) {
			return false
		}
	}
	return true
}

func sameSolutionBits(a, b *rolling.Solution) bool {
	return a.Window == b.Window && a.Panes == b.Panes && a.Filled == b.Filled && a.N == b.N &&
		a.First == b.First && a.Last == b.Last &&
		sameFitBits(&a.Line, &b.Line) && sameFitBits(&a.Parabola, &b.Parabola) && sameFitBits(&a.Exp, &b.Exp)
}

func TestRecord_RoundTrip(t *testing.T) {
	sols := append(sampleSolutions(t), goldenSolutions()...)
	// Odd bits that a fit should not produce but the format keeps.
	odd := sols[len(sols)-1]
	odd.Line.Coef[2] = math.Copysign(0, -1)
	odd.Parabola.R2 = math.NaN()
	odd.Exp.Cond = math.Inf(1)
	odd.Exp.First = time.Unix(0, 12345)
	sols = append(sols, odd)
	// A fit whose sums left float64's range keeps only its counts and times.
	out := sols[0]
	out.Line = rolling.Fit{Model: rolling.Line, Err: rolling.ErrNumeric, N: out.Line.N, First: out.Line.First, Last: out.Line.Last}
	sols = append(sols, out)
	codes := map[error]bool{}
	for i, sol := range sols {
		// The corrected errors are rebuilt from R1 and Pairs on decode, as
		// Solve builds them; complete the hand-made solutions likewise.
		for _, f := range []*rolling.Fit{&sol.Line, &sol.Parabola, &sol.Exp} {
			f.SetSerial(f.R1, f.Pairs)
		}
		codes[sol.Line.Err], codes[sol.Parabola.Err], codes[sol.Exp.Err] = true, true, true
		b, err := appendRecord(nil, &sol)
		if err != nil {
			t.Fatalf("solution %d: %v", i, err)
		}
		var got rolling.Solution
		got.Window = sol.Window
		if err := decodeRecord(b, &got); err != nil {
			t.Fatalf("solution %d: decode: %v", i, err)
		}
		if !sameSolutionBits(&got, &sol) {
			t.Errorf("solution %d: round trip differs:\n got %+v\nwant %+v", i, got, sol)
		}
		for cut := range len(b) {
			if err := decodeRecord(b[:cut], &got); err == nil {
				t.Errorf("solution %d truncated to %d of %d bytes decoded", i, cut, len(b))
			}
		}
	}
	for _, e := range errCodes {
		if !codes[e] {
			t.Errorf("samples never produce fit error %v", e)
		}
	}
}

// TestRecord_Golden pins the stored layout of format 2: a change to it
// must come with a new format byte, not rewrite old files' meaning.
// Refresh with go test -run Golden -update after such a change.
func TestRecord_Golden(t *testing.T) {
	var buf bytes.Buffer
	for _, sol := range goldenSolutions() {
		b, err := appendRecord(nil, &sol)
		if err != nil {
			t.Fatal(err)
		}
		fmt.Fprintf(&buf, "%s\n", hex.EncodeToString(b))
	}
	const path = "testdata/record_v2.golden"
	if *update {
		if err := os.WriteFile(path, buf.Bytes(), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(buf.Bytes(), want) {
		t.Errorf("record encoding differs from %s:\n got %s\nwant %s", path, buf.Bytes(), want)
	}
}

// TestRecord_DecodesFormat1 reads the records format 1 wrote (its golden
// file, written by the build that had it) back into the same solutions.
func TestRecord_DecodesFormat1(t *testing.T) {
	recs := readGolden(t, "testdata/record_v1.golden")
	want := goldenSolutions()
	for i := range want { // decoding rebuilds the corrected errors, as Solve makes them
		for _, f := range []*rolling.Fit{&want[i].Line, &want[i].Parabola, &want[i].Exp} {
			f.SetSerial(f.R1, f.Pairs)
		}
	}
	if len(recs) != len(want) {
		t.Fatalf("%d format 1 records, want %d", len(recs), len(want))
	}
	for i, b := range recs {
		if b[0] != recordFormat1 {
			t.Fatalf("record %d has format %d", i, b[0])
		}
		got := rolling.Solution{Window: want[i].Window}
		if err := decodeRecord(b, &got); err != nil {
			t.Fatalf("record %d: %v", i, err)
		}
		if !sameSolutionBits(&got, &want[i]) {
			t.Errorf("record %d:\n got %+v\nwant %+v", i, got, want[i])
		}
	}
}

// TestRecord_LeavesOutDerived checks that format 2 leaves out what
// follows from the rest for the fits rolling makes, so that the saving
// does not silently vanish: every sample fit with no error is stored
// with its standard errors and intervals derived.
func TestRecord_LeavesOutDerived(t *testing.T) {
	for i, sol := range sampleSolutions(t) {
		for _, f := range []*rolling.Fit{&sol.Line, &sol.Parabola, &sol.Exp} {
			if f.Err != nil {
				continue
			}
			want := byte(omitSE | omitCI)
			if got := derivable(f); got != want {
				t.Errorf("solution %d %v: omit flags %#x, want %#x", i, f.Model, derivable(f), want)
			}
		}
	}
}

func readGolden(t testing.TB, path string) [][]byte {
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var out [][]byte
	for _, line := range strings.Fields(string(data)) {
		b, err := hex.DecodeString(line)
		if err != nil {
			t.Fatal(err)
		}
		out = append(out, b)
	}
	return out
}

func goldenRecords(f *testing.F) [][]byte {
	return append(readGolden(f, "testdata/record_v1.golden"), readGolden(f, "testdata/record_v2.golden")...)
}

func FuzzDecodeRecord(f *testing.F) {
	for _, b := range goldenRecords(f) {
		f.Add(b)
	}
	for _, sol := range sampleSolutions(f) {
		b, err := appendRecord(nil, &sol)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
	f.Add([]byte{})
	f.Add([]byte{recordFormat})
	f.Fuzz(func(t *testing.T, b []byte) {
		var sol rolling.Solution
		sol.Window = rolling.WindowSpec{Span: time.Hour, Pane: time.Minute}
		if err := decodeRecord(b, &sol); err != nil {
			return
		}
		enc, err := appendRecord(nil, &sol)
		if err != nil {
			t.Fatalf("decoded record does not re-encode: %v", err)
		}
		var again rolling.Solution
		again.Window = sol.Window
		if err := decodeRecord(enc, &again); err != nil {
			t.Fatalf("re-encoded record does not decode: %v", err)
		}
		if !sameSolutionBits(&sol, &again) {
			t.Fatalf("round trip differs:\n%+v\n%+v", sol, again)
		}
	})
}

func FuzzDecodeSpecs(f *testing.F) {
	specs := []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}, {Span: 720 * time.Hour, Pane: 24 * time.Hour}}
	f.Add(appendSpecs(nil, len(specs), func(i int) rolling.WindowSpec { return specs[i] }))
	f.Add([]byte{specsFormat, 1, 1, 1})
	f.Add([]byte{specsFormat, 0})
	f.Fuzz(func(t *testing.T, b []byte) {
		got, err := decodeSpecs(b)
		if err != nil {
			return
		}
		enc := appendSpecs(nil, len(got), func(i int) rolling.WindowSpec { return got[i] })
		again, err := decodeSpecs(enc)
		if err != nil || !slices.Equal(got, again) {
			t.Fatalf("round trip of %v: %v, %v", got, again, err)
		}
	})
}

func FuzzSplitKeys(f *testing.F) {
	f.Add(appendPaneKey(nil, "plantA.boiler2.pt-101", rolling.PaneKey{Width: time.Hour, Index: -5}))
	f.Add(appendInt(appendWindowPrefix(nil, "a", rolling.WindowSpec{Span: time.Hour, Pane: time.Minute}), 1e18))
	f.Add([]byte{0})
	f.Fuzz(func(t *testing.T, b []byte) {
		if id, key, err := splitPaneKey(b); err == nil {
			if enc := appendPaneKey(nil, string(id), key); !bytes.Equal(enc, b) {
				t.Fatalf("pane key %x re-encodes as %x", b, enc)
			}
		}
		if id, ws, tm, err := splitHistoryKey(b); err == nil {
			if enc := appendInt(appendWindowPrefix(nil, string(id), ws), tm); !bytes.Equal(enc, b) {
				t.Fatalf("history key %x re-encodes as %x", b, enc)
			}
		}
	})
}
