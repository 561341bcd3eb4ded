package store

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"slices"
	"time"

	bolt "go.etcd.io/bbolt"

	"driftfit/rolling"
)

type opKind uint8

const (
	opPane      opKind = iota // put key/val into panes
	opSpecs                   // put key/val into sensors unless equal
	opHorizon                 // delete panes under prefix key with index < val
	opDelete                  // delete pane key
	opRecord                  // put key/val into history, key2 into the time index
	opDropPanes               // delete every pane key under prefix key
	opRestart                 // put key/val into restarts
	opSeq                     // put key/val into seqs
)

// span locates bytes in the batch's buffer. Offsets, not slices, because
// the buffer may move while the batch grows.
type span struct{ off, n int }

type op struct {
	kind           opKind
	key, val, key2 span
}

// Batch collects the writes of one commit: the changed panes, window
// specs and pane horizons of the sensors passed to Sensor, the fit
// records passed to Record, and the stream position. DB.Commit writes it
// in one bbolt transaction, so the position on disk always matches the
// state on disk.
//
// A Batch copies everything it needs when it is added, so the sensors
// may change again at once. It reuses its memory after a commit: keep one
// Batch and commit it repeatedly. A Batch is not safe for concurrent
// use. The zero value is an empty batch.
type Batch struct {
	buf    []byte
	ops    []op
	pos    uint64
	hasPos bool

	applied    uint64
	hasApplied bool

	alerts     []AlertWrite
	outboxDone []OutboxItem // Lane and Seq of delivered items
}

// Sensor snapshots the panes of s changed since the last snapshot, the
// window specs of s unless it was saved before (s.Saved), and the
// horizon of each pane width that moved since (stored panes older than
// every window get deleted on commit), then calls s.MarkSaved. A commit
// thus writes what changed, whatever the size of the fleet.
//
// The snapshot, not the sensor, is what a commit writes, and marking the
// sensor saved at the snapshot is what keeps readings from being lost: a
// reading that arrives between the snapshot and the commit marks its
// pane changed again for the next batch, whereas MarkSaved after the
// commit would clear that mark too. The price: if Commit fails, the
// changes live only in this Batch. Retry Commit with the same Batch, or
// stop and restore from the file (and replay from its position); never
// Reset a failed batch and carry on.
func (b *Batch) Sensor(id string, s *rolling.Sensor) error {
	if err := checkID(id); err != nil {
		return err
	}
	// A sensor saved before has its specs in the file (or in the batch
	// of a commit still to come), and stored panes can have left its
	// windows only where its horizon moved: the rest would be a lookup
	// per sensor and commit that changes nothing.
	if !s.Saved() {
		o := op{kind: opSpecs, key: b.appendKey(func(dst []byte) []byte { return append(dst, id...) })}
		o.val = b.appendKey(func(dst []byte) []byte { return appendSpecs(dst, s.Windows(), s.Spec) })
		b.ops = append(b.ops, o)
	}
	s.Changed(func(k rolling.PaneKey) {
		key := b.appendKey(func(dst []byte) []byte { return appendPaneKey(dst, id, k) })
		start := len(b.buf)
		b.buf = s.AppendPane(b.buf, k)
		b.ops = append(b.ops, op{kind: opPane, key: key, val: span{start, len(b.buf) - start}})
	})
	s.HorizonMoved(func(width time.Duration, oldest int64) {
		b.addHorizon(id, width, oldest)
	})
	s.MarkSaved()
	return nil
}

func (b *Batch) addHorizon(id string, width time.Duration, oldest int64) {
	key := b.appendKey(func(dst []byte) []byte { return appendPanePrefix(dst, id, width) })
	val := b.appendKey(func(dst []byte) []byte { return appendInt(dst, oldest) })
	b.ops = append(b.ops, op{kind: opHorizon, key: key, val: val})
}

func (b *Batch) addDelete(key []byte) {
	b.ops = append(b.ops, op{kind: opDelete, key: b.appendKey(func(dst []byte) []byte { return append(dst, key...) })})
}

// appendKey appends what fn appends to the buffer and returns its span.
func (b *Batch) appendKey(fn func([]byte) []byte) span {
	start := len(b.buf)
	b.buf = fn(b.buf)
	return span{start, len(b.buf) - start}
}

// Record adds the fit history record of sensor id for the window
// sol.Window at time sol.Last, as Sensor.Solve returned it just before
// the window's newest pane closed. Writing the same record twice (a
// replay after a crash) overwrites it: the key is sensor, window and
// time. Record returns ErrSensorID or ErrRecord for what cannot be
// stored; the batch is then unchanged.
func (b *Batch) Record(id string, sol *rolling.Solution) error {
	if err := checkID(id); err != nil {
		return err
	}
	if sol.Window.Span <= 0 || sol.Window.Pane <= 0 {
		return fmt.Errorf("%w: sensor %s: window %v/%v is not positive", ErrRecord, id, sol.Window.Span, sol.Window.Pane)
	}
	if sol.Last == (time.Time{}) {
		return fmt.Errorf("%w: sensor %s window %v: no time (Last is zero)", ErrRecord, id, sol.Window.Span)
	}
	mark, nops := len(b.buf), len(b.ops)
	t := sol.Last.UnixNano()
	o := op{kind: opRecord}
	o.key = b.appendKey(func(dst []byte) []byte {
		return appendInt(appendWindowPrefix(dst, id, sol.Window), t)
	})
	var err error
	o.val = b.appendKey(func(dst []byte) []byte {
		dst, err = appendRecord(dst, sol)
		return dst
	})
	if err != nil {
		b.buf, b.ops = b.buf[:mark], b.ops[:nops]
		return fmt.Errorf("store: record for %s window %v: %w", id, sol.Window.Span, err)
	}
	o.key2 = b.appendKey(func(dst []byte) []byte {
		return appendWindowPrefix(appendInt(dst, t), id, sol.Window)
	})
	b.ops = append(b.ops, o)
	return nil
}

// DropPanes deletes, when the batch commits, every stored pane of the
// sensor written before this call, as when its fits restart from a
// calibration; panes added with Sensor after it are kept. Fit history is
// not touched.
func (b *Batch) DropPanes(id string) error {
	if err := checkID(id); err != nil {
		return err
	}
	b.ops = append(b.ops, op{kind: opDropPanes, key: b.appendKey(func(dst []byte) []byte { return appendIDPrefix(dst, id) })})
	return nil
}

// SetRestart records, when the batch commits, that the fits of sensor
// id restarted at unixNano (as after a calibration): Restore returns it
// as Restored.Restart, so a restarted service can go on refusing older
// readings.
func (b *Batch) SetRestart(id string, unixNano int64) error {
	if err := checkID(id); err != nil {
		return err
	}
	o := op{kind: opRestart, key: b.appendKey(func(dst []byte) []byte { return append(dst, id...) })}
	o.val = b.appendKey(func(dst []byte) []byte { return appendInt(dst, unixNano) })
	b.ops = append(b.ops, o)
	return nil
}

// SetSeq records, when the batch commits, that the state of sensor id
// holds the messages of the stream up to sequence seq: Restore returns it
// as Restored.Seq, so that a restart reading the stream again from an
// older position (DB.Position) skips what the sensor already holds. A
// commit may thus write some sensors and not others, and stay exact.
func (b *Batch) SetSeq(id string, seq uint64) error {
	if err := checkID(id); err != nil {
		return err
	}
	o := op{kind: opSeq, key: b.appendKey(func(dst []byte) []byte { return append(dst, id...) })}
	o.val = b.appendKey(func(dst []byte) []byte { return binary.BigEndian.AppendUint64(dst, seq) })
	b.ops = append(b.ops, o)
	return nil
}

// SetPosition sets the stream position (the sequence of the last message
// whose readings the batch holds) to write with the batch. Without it,
// a commit leaves the stored position unchanged.
func (b *Batch) SetPosition(seq uint64) { b.pos, b.hasPos = seq, true }

// SetApplied records the count of readings applied to the state this
// commit holds, so that a count survives crashes exactly as the state does.
func (b *Batch) SetApplied(n uint64) { b.applied, b.hasApplied = n, true }

// Alerts adds one sensor's alert writes: its alert state, events, tickets
// and outbox items land in the same transaction as the panes and the
// position they derive from, so a crash keeps or loses them together.
// The batch keeps w's slices until the commit: do not change them. The
// outbox items the commit stores are listed, with their Seq, in
// CommitStats.Outbox.
func (b *Batch) Alerts(w AlertWrite) error {
	if err := checkID(w.Sensor); err != nil {
		return err
	}
	for _, it := range w.Outbox {
		if it.Lane == 0 {
			return fmt.Errorf("%w: outbox lane 0 is for items of earlier versions", ErrRecord)
		}
	}
	b.alerts = append(b.alerts, w)
	return nil
}

// OutboxDone deletes, when the batch commits, the delivered outbox item
// seq of lane.
func (b *Batch) OutboxDone(lane byte, seq uint64) {
	b.outboxDone = append(b.outboxDone, OutboxItem{Lane: lane, Seq: seq})
}

// Len returns the count of writes queued: panes, window specs, horizons,
// records, alert writes and outbox deletes (the position not counted).
func (b *Batch) Len() int { return len(b.ops) + len(b.alerts) + len(b.outboxDone) }

// Reset empties the batch, keeping its memory.
func (b *Batch) Reset() {
	b.buf, b.ops = b.buf[:0], b.ops[:0]
	b.pos, b.hasPos = 0, false
	b.applied, b.hasApplied = 0, false
	clear(b.alerts)
	b.alerts = b.alerts[:0]
	b.outboxDone = b.outboxDone[:0]
}

func (b *Batch) bytes(s span) []byte { return b.buf[s.off : s.off+s.n : s.off+s.n] }

// CommitStats describes one commit.
type CommitStats struct {
	// Bytes is the sum of the key and value sizes put: the payload
	// written. bbolt writes whole 4 KiB pages, so the file sees more.
	Bytes int
	// Puts and Deletes count the key/value pairs put and deleted.
	Puts, Deletes int
	// Outbox lists the outbox items the commit stored, with their Seq;
	// the data are copies, valid after the commit.
	Outbox []OutboxItem
}

// Commit writes the batches in one bbolt transaction (with fsync unless
// Options.NoSync), in order, and resets them. On error nothing was
// written and the batches are left intact for a retry (see Batch.Sensor).
// Committing only empty batches writes nothing and returns at once.
// Several batches let several goroutines each snapshot the sensors they
// own into their own batch, and still commit together.
//
// The values put stay in the batches' buffers until the transaction
// ends, as bbolt requires; that is why a batch is not reused until then.
func (db *DB) Commit(bs ...*Batch) (CommitStats, error) {
	empty := true
	for _, b := range bs {
		if b.Len() > 0 || b.hasPos || b.hasApplied {
			empty = false
		}
	}
	if empty {
		return CommitStats{}, nil
	}
	var st CommitStats
	err := db.bolt.Update(func(tx *bolt.Tx) error {
		st = CommitStats{}
		if panes, records, ok := sortedPuts(bs); ok {
			return applySorted(tx, bs, panes, records, &st)
		}
		for _, b := range bs {
			if err := b.apply(tx, &st, false); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return CommitStats{}, fmt.Errorf("store: commit %s: %w", db.path, err)
	}
	for _, b := range bs {
		b.Reset()
	}
	return st, nil
}

// opRef names op i of batch b among the batches of one commit.
type opRef struct{ b, i int }

// sortedPuts returns the pane puts and the fit records of the batches in
// key order, or false when they must be applied in batch order. bbolt
// splits a page only when the transaction commits, so all the keys a
// commit adds to one page go into one growing node, each insert moving
// the keys after it: in the order sensors were touched that is quadratic
// in the keys (the first commit of 10,000 sensors holding 270,000 panes
// took 37.6 s, in key order 1.3 s), and every record of a commit lands on
// the last page of the time index. In key order each insert lands at the end. The sorts are stable,
// so a key put twice keeps its last value. Reordering is safe while the
// batches delete nothing but below horizons: Sensor never puts a pane
// below its own horizon, and horizons only move forward, so putting every
// pane first and deleting below the horizons after ends where the batch
// order does. DropPanes and Restore's deletes keep the batch order.
func sortedPuts(bs []*Batch) (panes, records []opRef, ok bool) {
	for bi, b := range bs {
		for i := range b.ops {
			switch b.ops[i].kind {
			case opPane, opSeq:
				panes = append(panes, opRef{bi, i})
			case opRecord:
				records = append(records, opRef{bi, i})
			case opDropPanes, opDelete:
				return nil, nil, false
			}
		}
	}
	if len(panes)+len(records) < 2 {
		return nil, nil, false
	}
	// Panes first, then sequences, each in key order.
	slices.SortStableFunc(panes, func(x, y opRef) int {
		if kx, ky := bs[x.b].ops[x.i].kind, bs[y.b].ops[y.i].kind; kx != ky {
			return int(kx) - int(ky)
		}
		return bytes.Compare(keyOf(bs, x), keyOf(bs, y))
	})
	return panes, records, true
}

func keyOf(bs []*Batch, r opRef) []byte  { return bs[r.b].bytes(bs[r.b].ops[r.i].key) }
func key2Of(bs []*Batch, r opRef) []byte { return bs[r.b].bytes(bs[r.b].ops[r.i].key2) }

// applySorted writes the pane puts and the records in key order, then
// every other op of the batches in batch order.
func applySorted(tx *bolt.Tx, bs []*Batch, panes, records []opRef, st *CommitStats) error {
	pb, hist, htime := tx.Bucket(bucketPanes), tx.Bucket(bucketHistory), tx.Bucket(bucketHistTime)
	if pb == nil || hist == nil || htime == nil {
		return fmt.Errorf("%w: buckets missing", ErrCorrupt)
	}
	pb.FillPercent = paneFill
	put := st.put
	var seqs *bolt.Bucket
	for _, r := range panes {
		bk := pb
		if bs[r.b].ops[r.i].kind == opSeq {
			if seqs == nil {
				var err error
				if seqs, err = tx.CreateBucketIfNotExists(bucketSeqs); err != nil {
					return err
				}
			}
			bk = seqs
		}
		if err := put(bk, keyOf(bs, r), bs[r.b].bytes(bs[r.b].ops[r.i].val)); err != nil {
			return err
		}
	}
	slices.SortStableFunc(records, func(x, y opRef) int { return bytes.Compare(keyOf(bs, x), keyOf(bs, y)) })
	for _, r := range records {
		if err := put(hist, keyOf(bs, r), bs[r.b].bytes(bs[r.b].ops[r.i].val)); err != nil {
			return err
		}
	}
	slices.SortStableFunc(records, func(x, y opRef) int { return bytes.Compare(key2Of(bs, x), key2Of(bs, y)) })
	for _, r := range records {
		if err := put(htime, key2Of(bs, r), nil); err != nil {
			return err
		}
	}
	for _, b := range bs {
		if err := b.apply(tx, st, true); err != nil {
			return err
		}
	}
	return nil
}

// put puts k and v into bk and counts them.
func (st *CommitStats) put(bk *bolt.Bucket, k, v []byte) error {
	st.Puts++
	st.Bytes += len(k) + len(v)
	return bk.Put(k, v)
}

// paneFill is the panes bucket's fill of split pages: a sensor's new
// panes land just after its older ones, so a split page rarely takes
// more keys on its left.
const paneFill = 0.95

// apply writes the batch's ops in order; with putsDone, its pane puts
// and records were written already (applySorted).
func (b *Batch) apply(tx *bolt.Tx, st *CommitStats, putsDone bool) error {
	sensors, panes := tx.Bucket(bucketSensors), tx.Bucket(bucketPanes)
	if panes != nil {
		panes.FillPercent = paneFill
	}
	hist, htime := tx.Bucket(bucketHistory), tx.Bucket(bucketHistTime)
	if sensors == nil || panes == nil || hist == nil || htime == nil {
		return fmt.Errorf("%w: buckets missing", ErrCorrupt)
	}
	var cur *bolt.Cursor
	put := st.put
	for i := range b.ops {
		o := &b.ops[i]
		key, val := b.bytes(o.key), b.bytes(o.val)
		var err error
		switch o.kind {
		case opPane:
			if !putsDone {
				err = put(panes, key, val)
			}
		case opSpecs:
			if !bytes.Equal(sensors.Get(key), val) {
				err = put(sensors, key, val)
			}
		case opHorizon:
			if cur == nil {
				cur = panes.Cursor()
			}
			var n int
			n, err = deleteBelow(cur, key, readInt(val))
			st.Deletes += n
		case opDropPanes:
			if cur == nil {
				cur = panes.Cursor()
			}
			for k, _ := cur.Seek(key); k != nil && bytes.HasPrefix(k, key); k, _ = cur.Seek(key) {
				if err = cur.Delete(); err != nil {
					break
				}
				st.Deletes++
			}
		case opDelete:
			st.Deletes++
			err = panes.Delete(key)
		case opRestart:
			var bk *bolt.Bucket
			if bk, err = tx.CreateBucketIfNotExists(bucketRestarts); err == nil {
				err = put(bk, key, val)
			}
		case opSeq:
			if putsDone {
				break
			}
			var bk *bolt.Bucket
			if bk, err = tx.CreateBucketIfNotExists(bucketSeqs); err == nil {
				err = put(bk, key, val)
			}
		case opRecord:
			if putsDone {
				break
			}
			if err = put(hist, key, val); err == nil {
				err = put(htime, b.bytes(o.key2), nil)
			}
		}
		if err != nil {
			return err
		}
	}
	if len(b.alerts) > 0 {
		if err := writeAlerts(tx, b.alerts, st); err != nil {
			return err
		}
	}
	for _, it := range b.outboxDone {
		if err := deleteOutbox(tx, it.Lane, it.Seq); err != nil {
			return err
		}
		st.Deletes++
	}
	if b.hasPos {
		var v [8]byte
		binary.BigEndian.PutUint64(v[:], b.pos)
		if err := put(tx.Bucket(bucketStream), keyPosition, v[:]); err != nil {
			return err
		}
	}
	if b.hasApplied {
		var v [8]byte
		binary.BigEndian.PutUint64(v[:], b.applied)
		if err := put(tx.Bucket(bucketStream), keyApplied, v[:]); err != nil {
			return err
		}
	}
	return nil
}

// deleteBelow deletes the pane keys prefix+index with index < oldest.
// It seeks afresh after each delete rather than stepping the cursor on,
// which is correct whatever the cursor does after a delete.
func deleteBelow(c *bolt.Cursor, prefix []byte, oldest int64) (int, error) {
	n := 0
	for {
		k, _ := c.Seek(prefix)
		if len(k) != len(prefix)+8 || !bytes.HasPrefix(k, prefix) || readInt(k[len(prefix):]) >= oldest {
			return n, nil
		}
		if err := c.Delete(); err != nil {
			return n, err
		}
		n++
	}
}
