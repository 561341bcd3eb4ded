package store_test

import (
	"encoding/binary"
	"errors"
	"os"
	"strings"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"

	"driftfit/rolling"
	"driftfit/store"
)

func TestOpen_NewFileMode0600(t *testing.T) {
	path := tempPath(t)
	openDB(t, path)
	fi, err := os.Stat(path)
	if err != nil {
		t.Fatal(err)
	}
	// Mode 0600 can only lose bits to the umask, never gain them.
	if perm := fi.Mode().Perm(); perm&^0o600 != 0 {
		t.Errorf("file mode %v, want at most 0600", perm)
	}
}

func TestOpen_LockedFails(t *testing.T) {
	path := tempPath(t)
	openDB(t, path)
	const timeout = 200 * time.Millisecond
	for _, ro := range []bool{false, true} {
		start := time.Now()
		db, err := store.Open(path, store.Options{LockTimeout: timeout, ReadOnly: ro})
		elapsed := time.Since(start)
		if err == nil {
			db.Close()
			t.Fatalf("Open(ReadOnly=%v) of a locked file succeeded", ro)
		}
		if !errors.Is(err, store.ErrLocked) || !strings.Contains(err.Error(), path) {
			t.Errorf("Open(ReadOnly=%v) error = %v, want ErrLocked naming %s", ro, err, path)
		}
		// bbolt polls the lock every 50 ms until the timeout has passed.
		if elapsed > timeout+time.Second {
			t.Errorf("Open(ReadOnly=%v) took %v with lock timeout %v", ro, elapsed, timeout)
		}
	}
}

func TestOpen_ReadOnlyShared(t *testing.T) {
	path := tempPath(t)
	db := openDB(t, path)
	var b store.Batch
	b.SetPosition(7)
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	checkClose(t, db)

	opts := store.Options{ReadOnly: true, LockTimeout: 200 * time.Millisecond}
	r1, err := store.Open(path, opts)
	if err != nil {
		t.Fatalf("first read-only Open: %v", err)
	}
	defer r1.Close()
	r2, err := store.Open(path, opts)
	if err != nil {
		t.Fatalf("second read-only Open beside the first: %v", err)
	}
	defer r2.Close()
	if pos, err := r2.Position(); err != nil || pos != 7 {
		t.Errorf("read-only Position() = %d, %v, want 7", pos, err)
	}
	b.SetPosition(8)
	if _, err := r1.Commit(&b); err == nil {
		t.Error("Commit on a read-only DB succeeded")
	}
	// A writer cannot open while readers hold the shared lock.
	if _, err := store.Open(path, store.Options{LockTimeout: 100 * time.Millisecond}); !errors.Is(err, store.ErrLocked) {
		t.Errorf("writable Open beside readers: %v, want ErrLocked", err)
	}
}

func TestOpen_BadOptions(t *testing.T) {
	for _, tc := range []struct {
		name string
		opts store.Options
		want string
	}{
		{"negative timeout", store.Options{LockTimeout: -time.Second}, "lock timeout -1s is negative"},
		{"read-only no-sync", store.Options{ReadOnly: true, NoSync: true}, "NoSync"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := store.Open(tempPath(t), tc.opts)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("Open(%+v) error = %v, want one containing %q", tc.opts, err, tc.want)
			}
		})
	}
}

// writeBolt makes a bbolt file with the given buckets and key/values, as
// another program or a future version of this one might.
func writeBolt(t *testing.T, path string, data map[string]map[string][]byte) {
	t.Helper()
	bdb, err := bolt.Open(path, 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	err = bdb.Update(func(tx *bolt.Tx) error {
		for name, kv := range data {
			b, err := tx.CreateBucketIfNotExists([]byte(name))
			if err != nil {
				return err
			}
			for k, v := range kv {
				if err := b.Put([]byte(k), v); err != nil {
					return err
				}
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if err := bdb.Close(); err != nil {
		t.Fatal(err)
	}
}

func TestOpen_SchemaRefused(t *testing.T) {
	v99 := binary.BigEndian.AppendUint64(nil, 99)
	// Schema 1 stored the version as 8 bare bytes, as every value, with
	// no checksum.
	v1 := binary.BigEndian.AppendUint64(nil, 1)
	for _, tc := range []struct {
		name string
		data map[string]map[string][]byte
		want []string
	}{
		{"newer version", map[string]map[string][]byte{"meta": {"schema": v99}}, []string{"version 99", "reads 2"}},
		{"schema 1", map[string]map[string][]byte{"meta": {"schema": v1}, "panes": {"a": []byte("x")}}, []string{"version 1,", "reads 2", "new data directory"}},
		{"foreign file", map[string]map[string][]byte{"users": {"ann": []byte("x")}}, []string{"users", "found 0", "reads 2"}},
		{"short version", map[string]map[string][]byte{"meta": {"schema": {1}}}, []string{"found 0"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			path := tempPath(t)
			writeBolt(t, path, tc.data)
			for _, ro := range []bool{false, true} {
				db, err := store.Open(path, store.Options{ReadOnly: ro})
				if err == nil {
					db.Close()
					t.Fatalf("Open(ReadOnly=%v) succeeded", ro)
				}
				if !errors.Is(err, store.ErrSchema) {
					t.Errorf("Open(ReadOnly=%v) error = %v, want ErrSchema", ro, err)
				}
				for _, w := range tc.want {
					if ro && w == "users" {
						continue
					}
					if !strings.Contains(err.Error(), w) {
						t.Errorf("Open(ReadOnly=%v) error = %q, want it to contain %q", ro, err, w)
					}
				}
			}
			// The refusal released the lock: a plain bbolt open succeeds at once.
			bdb, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: 100 * time.Millisecond})
			if err != nil {
				t.Fatalf("file still locked after refusal: %v", err)
			}
			bdb.Close()
		})
	}
}

func TestOpen_NotBolt(t *testing.T) {
	path := tempPath(t)
	if err := os.WriteFile(path, []byte(strings.Repeat("not a database\n", 1000)), 0o600); err != nil {
		t.Fatal(err)
	}
	if db, err := store.Open(path, store.Options{}); err == nil {
		db.Close()
		t.Fatal("Open of a text file succeeded")
	} else if !strings.Contains(err.Error(), path) {
		t.Errorf("error %q does not name the path", err)
	}
}

func TestDB_Close_Idempotent(t *testing.T) {
	db, err := store.Open(tempPath(t), store.Options{NoSync: true})
	if err != nil {
		t.Fatal(err)
	}
	for i := range 3 {
		if err := db.Close(); err != nil {
			t.Errorf("Close #%d: %v", i+1, err)
		}
	}
	if _, err := db.Position(); err == nil {
		t.Error("Position after Close succeeded")
	}
}

func TestDB_Position_Reopen(t *testing.T) {
	db := openDB(t, tempPath(t))
	if pos, err := db.Position(); err != nil || pos != 0 {
		t.Fatalf("new file Position() = %d, %v, want 0", pos, err)
	}
	var b store.Batch
	for _, seq := range []uint64{1, 1 << 40, 1<<64 - 1} {
		b.SetPosition(seq)
		if _, err := db.Commit(&b); err != nil {
			t.Fatal(err)
		}
		db = reopen(t, db)
		if pos, err := db.Position(); err != nil || pos != seq {
			t.Errorf("after reopen Position() = %d, %v, want %d", pos, err, seq)
		}
	}
	// A batch without a position leaves the position alone.
	s, _ := rolling.NewSensor(rolling.WindowSpec{Span: day, Pane: hour})
	s.Add(rolling.Reading{UnixNano: 1, Value: 1})
	if err := b.Sensor("x", s); err != nil {
		t.Fatal(err)
	}
	if _, err := db.Commit(&b); err != nil {
		t.Fatal(err)
	}
	if pos, _ := db.Position(); pos != 1<<64-1 {
		t.Errorf("Position() after a batch without one = %d, want unchanged", pos)
	}
}

func TestBatch_BadSensorID(t *testing.T) {
	s, _ := rolling.NewSensor(rolling.WindowSpec{Span: day, Pane: hour})
	var b store.Batch
	for _, id := range []string{"", "a\x00b", strings.Repeat("x", store.MaxSensorID+1)} {
		if err := b.Sensor(id, s); !errors.Is(err, store.ErrSensorID) {
			t.Errorf("Sensor(%.20q) error = %v, want ErrSensorID", id, err)
		}
		sol := s.Solve(0)
		if err := b.Record(id, &sol); !errors.Is(err, store.ErrSensorID) {
			t.Errorf("Record(%.20q) error = %v, want ErrSensorID", id, err)
		}
	}
	if b.Len() != 0 {
		t.Errorf("Len() = %d after refused adds, want 0", b.Len())
	}
	if err := b.Sensor("plantA.boiler2.pt-101", s); err != nil {
		t.Errorf("dotted id refused: %v", err)
	}
}

func TestOpen_EmptyBoltFile(t *testing.T) {
	path := tempPath(t)
	writeBolt(t, path, nil)
	if db, err := store.Open(path, store.Options{ReadOnly: true}); !errors.Is(err, store.ErrSchema) {
		if err == nil {
			db.Close()
		}
		t.Errorf("read-only Open of an empty bbolt file: %v, want ErrSchema", err)
	}
	db := openDB(t, path) // a writer initialises it
	if pos, err := db.Position(); err != nil || pos != 0 {
		t.Errorf("Position() = %d, %v", pos, err)
	}
}

// TestCommit_KeyOrderKeepsLastWrite commits, across two batches, a pane
// and a fit record each written twice with different contents, in an
// order unlike key order: what the file holds afterwards is the last
// write of each, as in batch order.
func TestCommit_KeyOrderKeepsLastWrite(t *testing.T) {
	db := openDB(t, tempPath(t))
	t0 := time.Date(2031, 5, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	specs := []rolling.WindowSpec{{Span: day, Pane: hour}}
	var a, b store.Batch
	sensors := map[string]*rolling.Sensor{}
	var want []rolling.Solution
	for i, id := range []string{"zz.9", "aa.1", "mm.5"} {
		s, err := rolling.NewSensor(specs...)
		if err != nil {
			t.Fatal(err)
		}
		sensors[id] = s
		batch := &a
		if i == 1 {
			batch = &b
		}
		for round := range 2 {
			for j := range 3 {
				// Round 1 lands before round 0's readings in the same pane:
				// the record's key (its newest time) stays, its n grows.
				at := t0 + int64((1-round)*4+j)*int64(time.Minute)
				if err := s.Add(rolling.Reading{UnixNano: at, Value: float64(i*10 + round*3 + j)}); err != nil {
					t.Fatal(err)
				}
			}
			if err := batch.Sensor(id, s); err != nil { // the same pane key again in round 1
				t.Fatal(err)
			}
			sol := s.Solve(0)
			if err := batch.Record(id, &sol); err != nil { // the same key in round 1
				t.Fatal(err)
			}
			if round == 1 && id == "mm.5" {
				want = append(want, sol)
			}
		}
	}
	if _, err := db.Commit(&a, &b); err != nil {
		t.Fatal(err)
	}
	got := restoreAll(t, db, specs)
	for id, s := range sensors {
		x, y := s.Solve(0), got[id].Sensor.Solve(0)
		if d := diffSolution(&x, &y); d != "" {
			t.Errorf("%s: restored pane is not the last written: %s", id, d)
		}
	}
	var read []rolling.Solution
	if err := db.History("mm.5", rolling.WindowSpec{}, time.Time{}, time.Time{}, func(r store.HistoryRecord) error {
		read = append(read, r.Solution)
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	if len(read) != 1 || diffSolution(&read[0], &want[0]) != "" {
		t.Fatalf("history of mm.5: %d records, want the last of two writes of one key", len(read))
	}
}
