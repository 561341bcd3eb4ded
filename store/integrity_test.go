package store_test

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"

	"driftfit/rolling"
	"driftfit/store"
)

// contents is everything the store API reads back from a file.
type contents struct {
	fits     map[string][]rolling.Solution // per sensor, Solve of each window after Restore
	seqs     map[string]uint64             // per sensor, Restored.Seq
	restarts map[string]int64              // per sensor, Restored.Restart
	setAside map[string]error
	history  map[string][]store.HistoryRecord
	skipped  map[string]int // per sensor, records History reported skipped
	alerts   map[string]string
	pos      uint64
	posErr   error
	openErr  error
}

// readContents opens path and reads it all back through the store API.
// A read error other than a *SkippedError fails the test.
func readContents(t *testing.T, path string) contents {
	t.Helper()
	c := contents{fits: map[string][]rolling.Solution{}, seqs: map[string]uint64{}, restarts: map[string]int64{}, setAside: map[string]error{},
		history: map[string][]store.HistoryRecord{}, skipped: map[string]int{}, alerts: map[string]string{}}
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		c.openErr = err
		return c
	}
	defer checkClose(t, db)
	err = db.Restore(func(string) (*rolling.Sensor, error) { return rolling.NewSensor(defaultSpecs...) },
		func(r store.Restored) error {
			if r.SetAside != nil {
				c.setAside[r.ID] = r.SetAside
			}
			for w := range r.Sensor.Windows() {
				c.fits[r.ID] = append(c.fits[r.ID], r.Sensor.Solve(w))
			}
			c.seqs[r.ID], c.restarts[r.ID] = r.Seq, r.Restart
			return nil
		})
	if err != nil {
		t.Fatalf("Restore: %v", err)
	}
	var ids []string
	if err := db.HistorySensors(func(id string) error { ids = append(ids, id); return nil }); err != nil {
		var se *store.SkippedError
		if !errors.As(err, &se) {
			t.Fatalf("HistorySensors: %v", err)
		}
	}
	for _, id := range ids {
		err := db.History(id, rolling.WindowSpec{}, time.Time{}, time.Time{}, func(r store.HistoryRecord) error {
			c.history[id] = append(c.history[id], r)
			return nil
		})
		var se *store.SkippedError
		switch {
		case errors.As(err, &se):
			if !errors.Is(err, store.ErrCorrupt) {
				t.Errorf("History(%s) skipped error %v does not match ErrCorrupt", id, err)
			}
			c.skipped[id] = se.N
		case err != nil:
			t.Fatalf("History(%s): %v", id, err)
		}
	}
	if err := db.AlertStates(func(id string, s []byte) error { c.alerts[id] = string(s); return nil }); err != nil {
		var se *store.SkippedError
		if !errors.As(err, &se) {
			t.Fatalf("AlertStates: %v", err)
		}
	}
	c.pos, c.posErr = db.Position()
	return c
}

// lies compares what a damaged file gave back (got) with what the file
// held before (want) and describes every value that came back different
// instead of as an error or a set-aside sensor.
func lies(want, got contents) []string {
	if got.openErr != nil {
		return nil // refusing the whole file is not a lie
	}
	var out []string
	for id, fits := range got.fits {
		if got.setAside[id] != nil {
			continue
		}
		w, ok := want.fits[id]
		if !ok {
			out = append(out, "restored unknown sensor "+id)
			continue
		}
		if got.seqs[id] != want.seqs[id] || got.restarts[id] != want.restarts[id] {
			out = append(out, fmt.Sprintf("sensor %s: sequence %d, restart %d; were %d, %d", id, got.seqs[id], got.restarts[id], want.seqs[id], want.restarts[id]))
		}
		for i := range fits {
			if d := diffSolution(&fits[i], &w[i]); d != "" {
				out = append(out, fmt.Sprintf("sensor %s window %d: %s", id, i, d))
			}
		}
	}
	for id := range want.fits {
		if _, ok := got.fits[id]; !ok {
			out = append(out, "sensor "+id+" missing from Restore and not set aside")
		}
	}
	for id, recs := range got.history {
		byKey := map[string]store.HistoryRecord{}
		for _, r := range want.history[id] {
			byKey[fmt.Sprint(r.Solution.Window, r.Solution.Last.UnixNano())] = r
		}
		for _, r := range recs {
			w, ok := byKey[fmt.Sprint(r.Solution.Window, r.Solution.Last.UnixNano())]
			if !ok {
				out = append(out, fmt.Sprintf("history of %s: record at %v not in the file before", id, r.Solution.Last))
			} else if d := diffSolution(&r.Solution, &w.Solution); d != "" {
				out = append(out, fmt.Sprintf("history of %s at %v: %s", id, r.Solution.Last, d))
			}
		}
	}
	for id, recs := range want.history {
		if n := len(recs) - len(got.history[id]); n != got.skipped[id] {
			out = append(out, fmt.Sprintf("history of %s: %d records missing, %d reported skipped", id, n, got.skipped[id]))
		}
	}
	for id, s := range got.alerts {
		if want.alerts[id] != s {
			out = append(out, fmt.Sprintf("alert state of %s: %q, was %q", id, s, want.alerts[id]))
		}
	}
	if got.posErr == nil && got.pos != want.pos {
		out = append(out, fmt.Sprintf("position %d, was %d", got.pos, want.pos))
	}
	return out
}

// buildFile writes a file with panes, history, restart times, alert
// states and a position for a few sensors, and closes it.
func buildFile(t *testing.T, seed uint64) (path string, ids []string) {
	t.Helper()
	path = tempPath(t)
	db, err := store.Open(path, store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	f := newFeed(t, db, seed, 4, defaultSpecs)
	f.step(3000, 10*time.Minute)
	f.commit()
	var b store.Batch
	if err := b.SetRestart(f.ids[2], f.clock-int64(3*day)); err != nil {
		t.Fatal(err)
	}
	for i, id := range f.ids {
		if err := b.SetSeq(id, f.applied-uint64(i)); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	var ws []store.AlertWrite
	for _, id := range f.ids {
		ws = append(ws, store.AlertWrite{Sensor: id, State: []byte(`{"slope":"warning","since":"2031-03-19T04:00:00Z"}`)})
	}
	if err := db.WriteAlerts(ws); err != nil {
		t.Fatal(err)
	}
	checkClose(t, db)
	return path, f.ids
}

// valueSpans opens path with bbolt itself and returns where in the file
// the bytes of each stored value lie, for values found exactly once in
// the file (an old copy in a freed page would make the offset ambiguous).
func valueSpans(t *testing.T, path string) (spans [][2]int, names []string) {
	t.Helper()
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	bdb, err := bolt.Open(path, 0o600, &bolt.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer bdb.Close()
	err = bdb.View(func(tx *bolt.Tx) error {
		return tx.ForEach(func(name []byte, bk *bolt.Bucket) error {
			return bk.ForEach(func(k, v []byte) error {
				if len(v) < 12 || bytes.Count(raw, v) != 1 {
					return nil
				}
				off := bytes.Index(raw, v)
				spans = append(spans, [2]int{off, off + len(v)})
				names = append(names, fmt.Sprintf("%s/%x", name, k))
				return nil
			})
		})
	})
	if err != nil {
		t.Fatal(err)
	}
	return spans, names
}

func copyFile(t *testing.T, from string, edit func([]byte) []byte) string {
	t.Helper()
	raw, err := os.ReadFile(from)
	if err != nil {
		t.Fatal(err)
	}
	to := filepath.Join(t.TempDir(), "damaged.db")
	if err := os.WriteFile(to, edit(raw), 0o600); err != nil {
		t.Fatal(err)
	}
	return to
}

// TestByteFlips_NeverLie flips one random bit inside one stored value of
// a real file, many times over: every read must return what the file
// held before, or an error, or set the sensor aside — never a different
// value. Without checksums a flip in a float comes back as another
// number (a pane's exponent bit turned a fit's level into 9e77).
func TestByteFlips_NeverLie(t *testing.T) {
	const seed = 20261203
	t.Logf("seed %d", seed)
	path, _ := buildFile(t, seed)
	want := readContents(t, path)
	if len(want.fits) != 4 || len(want.setAside) != 0 || len(want.alerts) != 4 {
		t.Fatalf("undamaged file: %d sensors, %d set aside, %d alert states", len(want.fits), len(want.setAside), len(want.alerts))
	}
	spans, names := valueSpans(t, path)
	if len(spans) < 100 {
		t.Fatalf("only %d values located in the file", len(spans))
	}
	rng := rand.New(rand.NewPCG(seed, seed))
	n := 60
	if testing.Short() {
		n = 15
	}
	caught := 0
	for i := range n {
		j := rng.IntN(len(spans))
		at := spans[j][0] + rng.IntN(spans[j][1]-spans[j][0])
		bit := byte(1) << rng.IntN(8)
		damaged := copyFile(t, path, func(b []byte) []byte { b[at] ^= bit; return b })
		got := readContents(t, damaged)
		if l := lies(want, got); len(l) > 0 {
			t.Errorf("flip %d: bit %#x of byte %d in %s: %d values changed silently, the first: %s", i, bit, at, names[j], len(l), l[0])
		}
		if got.openErr != nil || len(got.setAside) > 0 || len(got.skipped) > 0 || got.posErr != nil || len(got.alerts) < 4 {
			caught++
		}
	}
	// Every value is sealed, so each flip shows somewhere.
	if caught != n {
		t.Errorf("%d of %d flips were noticed, want all", caught, n)
	}
}

// paneValueOffset returns where in the file the value of a pane of
// sensor id lies: the first found exactly once in the file.
func paneValueOffset(t *testing.T, path, id string) int {
	t.Helper()
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	bdb, err := bolt.Open(path, 0o600, &bolt.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer bdb.Close()
	off := -1
	_ = bdb.View(func(tx *bolt.Tx) error {
		c := tx.Bucket([]byte("panes")).Cursor()
		prefix := []byte(id + "\x00")
		for k, v := c.Seek(prefix); bytes.HasPrefix(k, prefix); k, v = c.Next() {
			if bytes.Count(raw, v) == 1 {
				off = bytes.Index(raw, v)
				return nil
			}
		}
		return nil
	})
	if off < 0 {
		t.Fatalf("pane of %s not located", id)
	}
	return off
}

// TestRestore_FlippedPaneSetAside flips the sign and the top exponent bit
// of a pane's level y0 (bytes 24–31 of the pane: rolling.AppendPane
// writes tmin, tmax, n, npos, then y0): the sensor is set aside and named,
// the others come back exact, and the set-aside state does not come back
// on the next restore.
func TestRestore_FlippedPaneSetAside(t *testing.T) {
	for _, tc := range []struct {
		name string
		bit  byte // of byte 31, the last of y0 (little-endian)
	}{
		{"sign", 0x80},
		{"exponent", 0x40},
	} {
		t.Run(tc.name, func(t *testing.T) {
			path, ids := buildFile(t, 7)
			want := readContents(t, path)
			bad := ids[1]
			off := paneValueOffset(t, path, bad)
			damaged := copyFile(t, path, func(b []byte) []byte { b[off+31] ^= tc.bit; return b })
			got := readContents(t, damaged)
			if l := lies(want, got); len(l) > 0 {
				t.Fatalf("%d values changed silently, the first: %s", len(l), l[0])
			}
			err := got.setAside[bad]
			if err == nil || !errors.Is(err, store.ErrSetAside) || !errors.Is(err, store.ErrChecksum) || !strings.Contains(err.Error(), bad) {
				t.Fatalf("set aside: %v; want %s set aside for a checksum error naming it", got.setAside, bad)
			}
			if len(got.setAside) != 1 {
				t.Errorf("%d sensors set aside, want 1", len(got.setAside))
			}
			// The fresh sensor holds nothing.
			if f := got.fits[bad][0]; f.N != 0 {
				t.Errorf("set-aside sensor restored with %d readings, want 0", f.N)
			}
			again := readContents(t, damaged)
			if len(again.setAside) != 0 || again.fits[bad] != nil {
				t.Errorf("second restore: set aside %v, sensor %s present %v; want its state moved away", again.setAside, bad, again.fits[bad] != nil)
			}
		})
	}
}

// sealed appends the CRC-32C (Castagnoli) of key and val, little-endian,
// as the store seals values (schema 2).
func sealed(key, val []byte) []byte {
	tab := crc32.MakeTable(crc32.Castagnoli)
	sum := crc32.Update(crc32.Update(0, tab, key), tab, val)
	return binary.LittleEndian.AppendUint32(append([]byte(nil), val...), sum)
}

// TestRestore_NonFinitePaneSetAside stores, with a valid checksum, a pane
// whose sum is +Inf, as a build without the commit check could write: the
// restore sets that one sensor aside (rolling.ErrBadPane) instead of
// refusing the whole file.
func TestRestore_NonFinitePaneSetAside(t *testing.T) {
	path, ids := buildFile(t, 8)
	want := readContents(t, path)
	bad := ids[3]
	bdb, err := bolt.Open(path, 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	err = bdb.Update(func(tx *bolt.Tx) error {
		bk := tx.Bucket([]byte("panes"))
		k, v := bk.Cursor().Seek([]byte(bad + "\x00"))
		p := bytes.Clone(v[:len(v)-4])
		binary.LittleEndian.PutUint64(p[24+8*9:], math.Float64bits(math.Inf(1))) // syy, the 10th sum
		return bk.Put(bytes.Clone(k), sealed(k, p))
	})
	if err == nil {
		err = bdb.Close()
	}
	if err != nil {
		t.Fatal(err)
	}
	got := readContents(t, path)
	if l := lies(want, got); len(l) > 0 {
		t.Fatalf("%d values changed silently, the first: %s", len(l), l[0])
	}
	if err := got.setAside[bad]; !errors.Is(err, rolling.ErrBadPane) || len(got.setAside) != 1 {
		t.Fatalf("set aside %v, want only %s for rolling.ErrBadPane", got.setAside, bad)
	}
}

func TestOpen_DamagedFileRefused(t *testing.T) {
	path, _ := buildFile(t, 9)
	// bbolt's high-water mark: pgid pages of 4 KiB, what Snapshot copies.
	// The file itself may be longer (bbolt grows it ahead).
	db := openDB(t, path)
	used, err := db.Snapshot(io.Discard)
	if err != nil {
		t.Fatal(err)
	}
	checkClose(t, db)
	if used < 64<<10 {
		t.Fatalf("file of %d bytes used too small to truncate meaningfully", used)
	}
	for _, tc := range []struct {
		name string
		edit func([]byte) []byte
		want []string
	}{
		{"empty", func([]byte) []byte { return nil }, []string{"empty (0 bytes)", "backup", "delete it"}},
		{"half", func(b []byte) []byte { return b[:len(b)/2] }, []string{"truncated", "meta page says"}},
		{"a page short", func(b []byte) []byte { return b[:used-4096] }, []string{"truncated", fmt.Sprint(used)}},
		{"meta pages only", func(b []byte) []byte { return b[:8192] }, []string{"truncated"}},
		{"meta pages zeroed", func(b []byte) []byte { clear(b[:8192]); return b }, []string{"no valid bbolt meta page"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			damaged := copyFile(t, path, tc.edit)
			for _, ro := range []bool{false, true} {
				db, err := store.Open(damaged, store.Options{ReadOnly: ro})
				if err == nil {
					db.Close()
					t.Fatalf("Open(ReadOnly=%v) succeeded", ro)
				}
				if !errors.Is(err, store.ErrFile) || !strings.Contains(err.Error(), damaged) {
					t.Errorf("Open(ReadOnly=%v) error = %v, want ErrFile naming the file", ro, err)
				}
				for _, w := range tc.want {
					if !strings.Contains(err.Error(), w) {
						t.Errorf("Open(ReadOnly=%v) error = %q, want it to contain %q", ro, err, w)
					}
				}
			}
			if tc.name == "empty" {
				if fi, err := os.Stat(damaged); err != nil || fi.Size() != 0 {
					t.Errorf("refused empty file changed: %v, %v", fi, err)
				}
			}
		})
	}
	// One damaged meta page is what bbolt survives with the other (the
	// file then holds the commit before the last).
	damaged := copyFile(t, path, func(b []byte) []byte { clear(b[:4096]); return b })
	db, err = store.Open(damaged, store.Options{ReadOnly: true})
	if err != nil {
		t.Fatalf("Open with meta page 0 zeroed: %v, want it to use page 1", err)
	}
	db.Close()
}

func TestDB_DropSensor(t *testing.T) {
	path, ids := buildFile(t, 10)
	want := readContents(t, path)
	db := openDB(t, path)
	gone := ids[2] // has a restart time and an alert state
	d, err := db.DropSensor(gone)
	if err != nil {
		t.Fatal(err)
	}
	if !d.Specs || d.Panes == 0 || !d.Restart || !d.Seq || !d.Alert {
		t.Errorf("DropSensor(%s) = %+v, want specs, panes, restart, sequence and alert state deleted", gone, d)
	}
	if d, err := db.DropSensor(gone); err != nil || d.Any() {
		t.Errorf("second DropSensor = %+v, %v; want nothing deleted", d, err)
	}
	if _, err := db.DropSensor("a\x00b"); !errors.Is(err, store.ErrSensorID) {
		t.Errorf("DropSensor of a bad id: %v, want ErrSensorID", err)
	}
	checkClose(t, db)
	got := readContents(t, path)
	if _, ok := got.fits[gone]; ok {
		t.Errorf("dropped sensor %s restored", gone)
	}
	if _, ok := got.alerts[gone]; ok {
		t.Errorf("dropped sensor %s kept its alert state", gone)
	}
	delete(want.fits, gone)
	delete(want.alerts, gone)
	if l := lies(want, got); len(l) > 0 {
		t.Errorf("after DropSensor: %d values changed, the first: %s", len(l), l[0])
	}
	if len(got.history[gone]) == 0 || len(got.history[gone]) != len(want.history[gone]) {
		t.Errorf("history of the dropped sensor: %d records, want all %d kept", len(got.history[gone]), len(want.history[gone]))
	}
}

// TestAlertReads_SkipDamaged damages one event, one ticket and one outbox
// item in a real file: each read hands over the others and counts the
// damaged one in a *SkippedError.
func TestAlertReads_SkipDamaged(t *testing.T) {
	path := tempPath(t)
	db := openDB(t, path)
	t0 := time.Date(2026, 8, 1, 0, 0, 0, 0, time.UTC)
	var w store.AlertWrite
	w.Sensor, w.Tickets = "qm.u1.steam.pt-102", map[string][]byte{}
	for i := range 3 {
		w.Events = append(w.Events, store.TimedValue{At: t0.Add(time.Duration(i) * time.Hour), Data: fmt.Appendf(nil, `{"event":%d,"pad":"quillmere vale"}`, i)})
		w.Tickets[fmt.Sprintf("qm.u1.steam.pt-102@%d", i)] = fmt.Appendf(nil, `{"ticket":%d,"pad":"quillmere vale"}`, i)
		w.Outbox = append(w.Outbox, store.OutboxItem{Lane: 1, Data: fmt.Appendf(nil, `{"delivery":%d,"pad":"quillmere vale"}`, i)})
	}
	if err := db.WriteAlerts([]store.AlertWrite{w}); err != nil {
		t.Fatal(err)
	}
	checkClose(t, db)
	damaged := copyFile(t, path, func(b []byte) []byte {
		for _, s := range []string{`{"event":1`, `{"ticket":2`, `{"delivery":0`} {
			if bytes.Count(b, []byte(s)) != 1 {
				t.Fatalf("%s found %d times in the file", s, bytes.Count(b, []byte(s)))
			}
			b[bytes.Index(b, []byte(s))+3] ^= 0x01
		}
		return b
	})
	db = openDB(t, damaged)
	check := func(what string, err error, got []string, want string) {
		t.Helper()
		var se *store.SkippedError
		if !errors.As(err, &se) || se.N != 1 || !errors.Is(err, store.ErrChecksum) {
			t.Errorf("%s: error %v, want a *SkippedError of 1 checksum error", what, err)
		}
		if fmt.Sprint(got) != want {
			t.Errorf("%s: read %v, want %s", what, got, want)
		}
	}
	var got []string
	err := db.Events(time.Time{}, time.Time{}, func(_ time.Time, d []byte) error { got = append(got, string(d[:10])); return nil })
	check("Events", err, got, `[{"event":0 {"event":2]`)
	got = nil
	err = db.Tickets(func(id string, _ []byte) error { got = append(got, id); return nil })
	check("Tickets", err, got, "[qm.u1.steam.pt-102@0 qm.u1.steam.pt-102@1]")
	items, err := db.Outbox(1, 0, 10)
	got = nil
	for _, it := range items {
		got = append(got, string(it.Data[:13]))
	}
	check("Outbox", err, got, `[{"delivery":1 {"delivery":2]`)
}
