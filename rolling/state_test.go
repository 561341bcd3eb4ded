package rolling_test

import (
	"encoding/binary"
	"errors"
	"maps"
	"math"
	"math/big"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

	"driftfit/rolling"
)

var defaultSpecs = []rolling.WindowSpec{
	{Span: 24 * time.Hour, Pane: time.Hour},
	{Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour},
}

// copyState writes every pane of src through AppendPane, in key order per
// width as a store returns them, and loads it into a new sensor.
func copyState(t *testing.T, src *rolling.Sensor, keys []rolling.PaneKey) *rolling.Sensor {
	t.Helper()
	slices.SortFunc(keys, func(a, b rolling.PaneKey) int {
		if a.Width != b.Width {
			return int(a.Width - b.Width)
		}
		return int(a.Index - b.Index)
	})
	dst := newSensor(t, defaultSpecs...)
	for _, k := range keys {
		data := src.AppendPane(nil, k)
		if len(data) == 0 {
			continue // slid out since it was recorded
		}
		if err := dst.LoadPane(k, data); err != nil {
			t.Fatalf("LoadPane(%v): %v", k, err)
		}
	}
	return dst
}

func sameSolutions(t *testing.T, a, b *rolling.Sensor) {
	t.Helper()
	for i := range a.Windows() {
		sa, sb := a.Solve(i), b.Solve(i)
		for _, m := range rolling.Models {
			fa, fb := sa.Fit(m), sb.Fit(m)
			if fa.Err != fb.Err || fa.N != fb.N || fa.Coef != fb.Coef || fa.SE != fb.SE || fa.Cov != fb.Cov ||
				math.Float64bits(fa.ResidSD) != math.Float64bits(fb.ResidSD) || math.Float64bits(fa.R2) != math.Float64bits(fb.R2) {
				t.Fatalf("window %d %v differs:\n%+v\n%+v", i, m, *fa, *fb)
			}
		}
	}
}

// TestSensor_PaneState_RoundTrip checks that saving the changed panes after
// every batch of readings and loading them into a fresh sensor restores it
// exactly, including panes with readings ≤ 0 and out-of-order readings.
func TestSensor_PaneState_RoundTrip(t *testing.T) {
	seed := uint64(99)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	live := newSensor(t, defaultSpecs...)
	saved := map[rolling.PaneKey]bool{}
	tn := t2026
	for batch := range 200 {
		for range 50 {
			tn += rng.Int64N(int64(40 * time.Minute))
			at := tn - rng.Int64N(int64(3*time.Hour)) // some arrive late
			v := 1 + rng.NormFloat64()                // some are ≤ 0
			if err := live.Add(rolling.Reading{UnixNano: at, Value: v}); err != nil && !errors.Is(err, rolling.ErrTooOld) {
				t.Fatal(err)
			}
		}
		live.Changed(func(k rolling.PaneKey) { saved[k] = true })
		live.MarkSaved()
		if batch%50 == 49 {
			keys := make([]rolling.PaneKey, 0, len(saved))
			for k := range saved {
				keys = append(keys, k)
			}
			sameSolutions(t, live, copyState(t, live, keys))
		}
	}
	n := 0
	live.Changed(func(rolling.PaneKey) { n++ })
	if n != 0 {
		t.Errorf("Changed after MarkSaved reported %d panes", n)
	}
}

func TestSensor_LoadPane_Rejects(t *testing.T) {
	s := newSensor(t, defaultSpecs...)
	for i := range 30 {
		if err := s.Add(rolling.Reading{UnixNano: t2026 + int64(i)*int64(time.Hour), Value: float64(i)}); err != nil {
			t.Fatal(err)
		}
	}
	key := rolling.PaneKey{Width: time.Hour, Index: t2026/int64(time.Hour) + 29}
	good := s.AppendPane(nil, key)
	if len(good) != 160 {
		t.Fatalf("pane encoding is %d bytes, want 160", len(good))
	}
	flip := func(off int, b byte) []byte { d := slices.Clone(good); d[off] ^= b; return d }
	nan := slices.Clone(good)
	copy(nan[24:], []byte{0, 0, 0, 0, 0, 0, 0xf8, 0x7f}) // y0 = NaN
	huge := slices.Clone(good)
	binary.LittleEndian.PutUint64(huge[24:], math.Float64bits(1e146)) // y0 beyond MaxValue
	cases := []struct {
		name string
		key  rolling.PaneKey
		data []byte
		want error
	}{
		{"short", key, good[:100], rolling.ErrBadPane},
		{"nan", key, nan, rolling.ErrBadPane},
		{"value beyond MaxValue", key, huge, rolling.ErrBadPane},
		{"time outside pane", key, flip(7, 0x40), rolling.ErrBadPane},
		{"wrong index", rolling.PaneKey{Width: time.Hour, Index: key.Index + 1}, good, rolling.ErrBadPane},
		{"unknown width", rolling.PaneKey{Width: time.Minute, Index: key.Index}, good, rolling.ErrBadSpec},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			d := newSensor(t, defaultSpecs...)
			if err := d.LoadPane(tc.key, tc.data); !errors.Is(err, tc.want) {
				t.Errorf("LoadPane = %v, want %v", err, tc.want)
			}
		})
	}
	// A pane older than the ring once newer ones are loaded is stale.
	d := newSensor(t, defaultSpecs...)
	if err := d.LoadPane(key, good); err != nil {
		t.Fatal(err)
	}
	old := newSensor(t, defaultSpecs...)
	if err := old.Add(rolling.Reading{UnixNano: t2026, Value: 1}); err != nil {
		t.Fatal(err)
	}
	oldKey := rolling.PaneKey{Width: time.Hour, Index: t2026 / int64(time.Hour)}
	if err := d.LoadPane(oldKey, old.AppendPane(nil, oldKey)); !errors.Is(err, rolling.ErrTooOld) {
		t.Errorf("LoadPane of a pane 29 h older than the newest = %v, want ErrTooOld", err)
	}
}

// FuzzLoadPane checks that stored bytes never panic the decoder and that
// whatever it accepts re-encodes to the same bytes.
func FuzzLoadPane(f *testing.F) {
	s, _ := rolling.NewSensor(defaultSpecs...)
	for i := range 5 {
		_ = s.Add(rolling.Reading{UnixNano: t2026 + int64(i)*int64(10*time.Minute), Value: float64(i) - 1})
	}
	key := rolling.PaneKey{Width: time.Hour, Index: t2026 / int64(time.Hour)}
	f.Add(int64(key.Index), s.AppendPane(nil, key))
	f.Add(int64(0), make([]byte, 160))
	lk := rolling.PaneKey{Width: time.Hour, Index: t2026/int64(time.Hour) + 2}
	f.Add(lk.Index, legacyPane(lk, []rolling.Reading{{UnixNano: lk.Index*int64(time.Hour) + 5, Value: 2}, {UnixNano: lk.Index*int64(time.Hour) + 9e11, Value: 3}}))
	f.Add(int64(0), make([]byte, 128))
	f.Fuzz(func(t *testing.T, index int64, data []byte) {
		d, _ := rolling.NewSensor(defaultSpecs...)
		k := rolling.PaneKey{Width: time.Hour, Index: index}
		if err := d.LoadPane(k, data); err != nil {
			return
		}
		got := d.AppendPane(nil, k)
		if len(data) == 128 || len(data) == 144 {
			// The earlier layout loads into the present one; that must
			// then round-trip.
			e, _ := rolling.NewSensor(defaultSpecs...)
			if err := e.LoadPane(k, got); err != nil {
				t.Fatalf("re-encoded legacy pane does not load: %v\n%x", err, got)
			}
			data = e.AppendPane(nil, k)
		}
		if !slices.Equal(got, data) {
			t.Fatalf("re-encoded pane differs:\n%x\n%x", got, data)
		}
		sol := d.Solve(0)
		for _, m := range rolling.Models {
			f := sol.Fit(m)
			for _, v := range append(append(f.Coef[:], f.SE[:]...), f.ResidSD, f.R2, f.Cond) {
				if math.IsNaN(v) {
					t.Fatalf("%v fit has NaN: %+v", m, *f)
				}
			}
		}
	})
}

func TestSensor_Closes(t *testing.T) {
	s := newSensor(t, defaultSpecs...)
	if s.Closes(t2026) != 0 {
		t.Error("an empty sensor has no pane to close")
	}
	_ = s.Add(rolling.Reading{UnixNano: t2026 + int64(30*time.Minute), Value: 1})
	cases := []struct {
		at   int64
		want uint64
	}{
		{t2026 + int64(59*time.Minute), 0},
		{t2026 + int64(time.Hour), 0b01},
		{t2026 + day, 0b11},
		{t2026 - day, 0},
	}
	for _, tc := range cases {
		if got := s.Closes(tc.at); got != tc.want {
			t.Errorf("Closes(+%v) = %b, want %b", time.Duration(tc.at-t2026), got, tc.want)
		}
	}
}

// TestSensor_ClosesEdges checks Closes against its definition, a reading
// in a later pane than the newest (⌊t/w⌋ taken with math/big, so nothing
// can overflow), at the ends of int64 time and across zero.
func TestSensor_ClosesEdges(t *testing.T) {
	floor := func(a, w int64) *big.Int {
		q, m := new(big.Int), new(big.Int)
		q.DivMod(big.NewInt(a), big.NewInt(w), m) // Euclidean: floor for w > 0
		return q
	}
	hour, day := int64(time.Hour), int64(24*time.Hour)
	for _, first := range []int64{math.MinInt64, math.MinInt64 + day, -1, 0, day - 1, math.MaxInt64 - day, math.MaxInt64} {
		s := newSensor(t, defaultSpecs...)
		if err := s.Add(rolling.Reading{UnixNano: first, Value: 1}); err != nil {
			t.Fatalf("Add(%d): %v", first, err)
		}
		for _, d := range []int64{math.MinInt64, -day, -hour, -1, 0, 1, hour - 1, hour, day, math.MaxInt64} {
			at := first + d // wraps on purpose at the ends: any time must do
			var want uint64
			for i, w := range []int64{hour, day} {
				if floor(at, w).Cmp(floor(first, w)) > 0 {
					want |= 1 << i
				}
			}
			if got := s.Closes(at); got != want {
				t.Errorf("after a reading at %d, Closes(%d) = %b, want %b", first, at, got, want)
			}
		}
	}
}

// TestSensor_HorizonMoved checks what a store needs to skip work on a
// commit: Saved only after MarkSaved, and HorizonMoved reports a width
// (with Horizon's index) only while its newest pane differs from the
// one at the last MarkSaved.
func TestSensor_HorizonMoved(t *testing.T) {
	s := newSensor(t, defaultSpecs...)
	moved := func() map[time.Duration]int64 {
		got := map[time.Duration]int64{}
		s.HorizonMoved(func(w time.Duration, oldest int64) { got[w] = oldest })
		return got
	}
	all := func() map[time.Duration]int64 {
		got := map[time.Duration]int64{}
		s.Horizon(func(w time.Duration, oldest int64) { got[w] = oldest })
		return got
	}
	add := func(at int64) {
		t.Helper()
		if err := s.Add(rolling.Reading{UnixNano: at, Value: 1}); err != nil {
			t.Fatal(err)
		}
	}
	if s.Saved() || len(moved()) != 0 {
		t.Fatalf("new sensor: Saved %v, HorizonMoved %v; want false, none (no pane yet)", s.Saved(), moved())
	}
	h := int64(time.Hour)
	base := t2026 - t2026%(24*h) // midnight
	add(base)
	if got, want := moved(), all(); len(want) != 2 || !maps.Equal(got, want) {
		t.Fatalf("before the first MarkSaved: HorizonMoved %v, Horizon %v; want both widths", got, want)
	}
	s.MarkSaved()
	if !s.Saved() || len(moved()) != 0 {
		t.Fatalf("after MarkSaved: Saved %v, HorizonMoved %v; want true, none", s.Saved(), moved())
	}
	add(base + h/2) // same hourly and daily pane
	if len(moved()) != 0 {
		t.Fatalf("a reading in the newest panes moved %v", moved())
	}
	add(base + h) // next hour, same day
	got := moved()
	if len(got) != 1 || got[time.Hour] != all()[time.Hour] {
		t.Fatalf("next hour: HorizonMoved %v, Horizon %v; want the hourly width alone", got, all())
	}
	s.MarkSaved()
	add(base + 24*h) // next day: both move
	if got, want := moved(), all(); !maps.Equal(got, want) || len(got) != 2 {
		t.Fatalf("next day: HorizonMoved %v, want %v", got, want)
	}
}

// TestSensor_WarmChangesNothing checks that Warm, a read for the caches'
// sake, leaves a sensor as it was, fresh or holding panes.
func TestSensor_WarmChangesNothing(t *testing.T) {
	fresh, live := newSensor(t, defaultSpecs...), newSensor(t, defaultSpecs...)
	fresh.Warm()
	n := 0
	fresh.Changed(func(rolling.PaneKey) { n++ })
	if n != 0 || fresh.Saved() {
		t.Fatalf("Warm on a fresh sensor: %d panes changed, saved %v", n, fresh.Saved())
	}
	twin := newSensor(t, defaultSpecs...)
	for i := range 100 {
		r := rolling.Reading{UnixNano: t2026 + int64(i)*int64(17*time.Minute), Value: 1 + float64(i%7)}
		live.Warm()
		for _, s := range []*rolling.Sensor{live, twin} {
			if err := s.Add(r); err != nil {
				t.Fatal(err)
			}
		}
	}
	sameSolutions(t, live, twin)
}

// legacyPane encodes readings of one pane in the earlier 128-byte layout
// (time from the pane's centre, u = (t − k·w)/w − ½, no lag sums), all
// values positive, as the sums were written before.
func legacyPane(key rolling.PaneKey, rs []rolling.Reading) []byte {
	w := int64(key.Width)
	var tmin, tmax int64 = math.MaxInt64, math.MinInt64
	var su, su2, su3, su4, sy, suy, su2y, syy, sl, sul, sll float64
	y0, l0 := rs[0].Value, math.Log(rs[0].Value)
	for _, r := range rs {
		tmin, tmax = min(tmin, r.UnixNano), max(tmax, r.UnixNano)
		u := float64(r.UnixNano-key.Index*w)/float64(w) - 0.5
		dy, dl := r.Value-y0, math.Log(r.Value)-l0
		su, su2, su3, su4 = su+u, su2+u*u, su3+u*u*u, su4+u*u*u*u
		sy, suy, su2y, syy = sy+dy, suy+u*dy, su2y+u*u*dy, syy+dy*dy
		sl, sul, sll = sl+dl, sul+u*dl, sll+dl*dl
	}
	b := binary.LittleEndian.AppendUint64(nil, uint64(tmin))
	b = binary.LittleEndian.AppendUint64(b, uint64(tmax))
	b = binary.LittleEndian.AppendUint32(b, uint32(len(rs)))
	b = binary.LittleEndian.AppendUint32(b, uint32(len(rs)))
	for _, v := range []float64{y0, l0, su, su2, su3, su4, sy, suy, su2y, syy, sl, sul, sll} {
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
	}
	return b
}

// TestSensor_LoadPane_Legacy checks that panes in the earlier 128-byte
// layout load into the present one: the fit equals that of a sensor fed
// the same readings to 1e-12, and the panes count as unordered (no lag
// pairs), since their order was not recorded.
func TestSensor_LoadPane_Legacy(t *testing.T) {
	seed := uint64(8)
	t.Logf("seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 0))
	spec := rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour}
	live := newSensor(t, spec)
	loaded := newSensor(t, spec)
	byPane := map[int64][]rolling.Reading{}
	for i := range 24 * 12 {
		r := rolling.Reading{UnixNano: t2026 + int64(i)*int64(5*time.Minute) + rng.Int64N(int64(time.Minute)), Value: 40 + 0.1*float64(i)/12 + rng.NormFloat64()}
		if err := live.Add(r); err != nil {
			t.Fatal(err)
		}
		k := r.UnixNano / int64(time.Hour)
		byPane[k] = append(byPane[k], r)
	}
	keys := slices.Sorted(maps.Keys(byPane))
	for _, k := range keys {
		key := rolling.PaneKey{Width: time.Hour, Index: k}
		data := legacyPane(key, byPane[k])
		if len(data) != 128 {
			t.Fatalf("legacy pane is %d bytes", len(data))
		}
		if err := loaded.LoadPane(key, data); err != nil {
			t.Fatalf("LoadPane(legacy %v): %v", key, err)
		}
	}
	a, b := live.Solve(0), loaded.Solve(0)
	for _, m := range rolling.Models {
		fa, fb := a.Fit(m), b.Fit(m)
		for j := range m.Coefs() {
			if math.Abs(fa.Coef[j]-fb.Coef[j]) > 1e-12*max(math.Abs(fa.Coef[j]), fa.SE[j]) || math.Abs(fa.SE[j]-fb.SE[j]) > 1e-12*fa.SE[j] {
				t.Errorf("%v c%d: legacy %.17g ± %.17g, live %.17g ± %.17g", m, j, fb.Coef[j], fb.SE[j], fa.Coef[j], fa.SE[j])
			}
		}
		if fb.Pairs != 0 || !errors.Is(fb.SerialErr, rolling.ErrSerialUnknown) {
			t.Errorf("%v: legacy panes gave %d pairs (%v), want none", m, fb.Pairs, fb.SerialErr)
		}
	}
}

// FuzzAddSaveLoad checks that whatever Add accepts, the panes it writes
// load again: what a commit writes is what a restore accepts. The input
// is read as (time offset, value) pairs of 16 bytes.
func FuzzAddSaveLoad(f *testing.F) {
	seed := func(vals ...float64) []byte {
		var b []byte
		for i, v := range vals {
			b = binary.LittleEndian.AppendUint64(b, uint64(i)*uint64(7*time.Minute))
			b = binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
		}
		return b
	}
	f.Add(seed(1, 2, 3, -1, 0))
	f.Add(seed(rolling.MaxValue, -rolling.MaxValue, 0, rolling.MaxValue))
	f.Add(seed(1e-300, 5e-324, -1e-200, 1e145, 3))
	f.Fuzz(func(t *testing.T, data []byte) {
		s, _ := rolling.NewSensor(defaultSpecs...)
		for len(data) >= 16 {
			off := int64(binary.LittleEndian.Uint64(data) % uint64(48*time.Hour))
			v := math.Float64frombits(binary.LittleEndian.Uint64(data[8:]))
			data = data[16:]
			_ = s.Add(rolling.Reading{UnixNano: t2026 + off, Value: v})
		}
		var keys []rolling.PaneKey
		s.Changed(func(k rolling.PaneKey) { keys = append(keys, k) })
		sameSolutions(t, s, copyState(t, s, keys))
	})
}
