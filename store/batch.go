package store

import (
	"bytes"
	"encoding/binary"
	"errors"
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
	opSetAside                // move the specs and panes of sensor key (and its restart if val is 1) into set-aside
	opSkip                    // nothing: an op Commit leaves out (skipSeqs)
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

	// setAside are the sensors Sensor refused to snapshot since the
	// last commit; scratch holds one sensor per set of window specs, to
	// check panes with the very decoder Restore uses.
	setAside []*SensorError
	scratch  map[string]*rolling.Sensor
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
//
// Every pane is checked as Restore will check it (rolling.LoadPane). A
// sensor with a pane Restore would refuse (a sum grown infinite, say) is
// left out of the batch whole, its stream sequence (SetSeq) too, and not
// marked saved: the file keeps its last good state, the rest of the
// commit lands, and Commit reports the sensor in CommitStats.SetAside. Its changes stay pending, so a later
// snapshot writes them all once the bad pane has left its windows.
// Until then a restart restores the sensor as it was at its last good
// commit. Sensor returns an error only for an invalid id.
func (b *Batch) Sensor(id string, s *rolling.Sensor) error {
	if err := checkID(id); err != nil {
		return err
	}
	m := b.mark()
	b.snapshot(id, s)
	b.settle(id, s, m)
	return nil
}

// snapshot adds the changed panes, specs and horizons of s to the batch.
func (b *Batch) snapshot(id string, s *rolling.Sensor) {
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
}

// settle keeps the snapshot of s added since m and marks s saved, or,
// when a pane of it would not load, takes the snapshot back out and sets
// the sensor aside.
func (b *Batch) settle(id string, s *rolling.Sensor, m batchMark) {
	if err := b.checkPanes(s, b.ops[m.ops:]); err != nil {
		b.undo(m)
		b.setAside = append(b.setAside, &SensorError{Sensor: id, Err: err})
		return
	}
	s.MarkSaved()
}

// checkPanes loads the panes put by ops into a scratch sensor with the
// windows of s, and returns the first refusal.
func (b *Batch) checkPanes(s *rolling.Sensor, ops []op) error {
	var sig [64]byte
	key := appendSpecs(sig[:0], s.Windows(), s.Spec)
	scratch := b.scratch[string(key)]
	if scratch == nil {
		specs := make([]rolling.WindowSpec, s.Windows())
		for i := range specs {
			specs[i] = s.Spec(i)
		}
		var err error
		if scratch, err = rolling.NewSensor(specs...); err != nil {
			return err
		}
		if b.scratch == nil {
			b.scratch = map[string]*rolling.Sensor{}
		}
		b.scratch[string(key)] = scratch
	}
	for i := range ops {
		if ops[i].kind != opPane {
			continue
		}
		_, pk, err := splitPaneKey(b.bytes(ops[i].key))
		if err == nil {
			err = scratch.LoadPane(pk, b.bytes(ops[i].val))
		}
		// A pane older than the scratch sensor's last one decoded fine.
		if err != nil && !errors.Is(err, rolling.ErrTooOld) {
			return err
		}
	}
	return nil
}

func (b *Batch) addHorizon(id string, width time.Duration, oldest int64) {
	key := b.appendKey(func(dst []byte) []byte { return appendPanePrefix(dst, id, width) })
	val := b.appendKey(func(dst []byte) []byte { return appendInt(dst, oldest) })
	b.ops = append(b.ops, op{kind: opHorizon, key: key, val: val})
}

// addSetAside queues the move of sensor id's stored specs and panes,
// and its restart time if withRestart, into the set-aside bucket.
func (b *Batch) addSetAside(id string, withRestart bool) {
	o := op{kind: opSetAside, key: b.appendKey(func(dst []byte) []byte { return append(dst, id...) })}
	if withRestart {
		o.val = b.appendKey(func(dst []byte) []byte { return append(dst, 1) })
	}
	b.ops = append(b.ops, o)
}

// batchMark is a point to roll a batch back to.
type batchMark struct{ buf, ops int }

func (b *Batch) mark() batchMark  { return batchMark{len(b.buf), len(b.ops)} }
func (b *Batch) undo(m batchMark) { b.buf, b.ops = b.buf[:m.buf], b.ops[:m.ops] }

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
	o.key2 = b.appendKey(func(dst []byte) []byte { return appendDayKey(dst, t, id, sol.Window) })
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
	clear(b.setAside)
	b.setAside = b.setAside[:0]
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

	// SetAside lists the sensors left out of the commit because their
	// state could not be stored as Restore would read it back (see
	// Batch.Sensor), each with the reason. The rest of the commit landed.
	SetAside []*SensorError

	seal sealer
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
	var setAside []*SensorError
	for _, b := range bs {
		if b.Len() > 0 || b.hasPos || b.hasApplied {
			empty = false
		}
		setAside = append(setAside, b.setAside...)
	}
	if empty {
		for _, b := range bs {
			b.Reset()
		}
		return CommitStats{SetAside: setAside}, nil
	}
	skipSeqs(bs, setAside)
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
	st.seal, st.SetAside = sealer{}, setAside
	return st, nil
}

// skipSeqs drops the stream sequences (SetSeq) of the sensors set aside:
// their stored state stays at an older sequence, and storing the new one
// would make a restart skip messages that state never held. It also
// drops those at or below the position the same commit stores: a restart
// reads on from after the position, so such a sequence skips nothing,
// and a commit that holds every changed sensor then writes no sequence.
// An older sequence left in the file is below the position too.
func skipSeqs(bs []*Batch, setAside []*SensorError) {
	var pos uint64
	for _, b := range bs {
		if b.hasPos {
			pos = max(pos, b.pos)
		}
	}
	if len(setAside) == 0 && pos == 0 {
		return
	}
	var ids map[string]bool // nil when none is set aside: every lookup false
	if len(setAside) > 0 {
		ids = make(map[string]bool, len(setAside))
		for _, e := range setAside {
			ids[e.Sensor] = true
		}
	}
	for _, b := range bs {
		for i := range b.ops {
			o := &b.ops[i]
			if o.kind != opSeq {
				continue
			}
			if ids[string(b.bytes(o.key))] || binary.BigEndian.Uint64(b.bytes(o.val)) <= pos {
				o.kind = opSkip
			}
		}
	}
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
// the last page of the time index. In key order each insert lands at the
// end. The sorts keep batch order among equal keys, so a key put twice
// keeps its last value. Reordering is safe while the
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
			case opDropPanes, opDelete, opSetAside:
				return nil, nil, false
			}
		}
	}
	if len(panes)+len(records) < 2 {
		return nil, nil, false
	}
	// Panes first, then sequences, each in key order.
	slices.SortFunc(panes, func(x, y opRef) int {
		if kx, ky := bs[x.b].ops[x.i].kind, bs[y.b].ops[y.i].kind; kx != ky {
			return int(kx) - int(ky)
		}
		if c := bytes.Compare(keyOf(bs, x), keyOf(bs, y)); c != 0 {
			return c
		}
		return x.cmp(y)
	})
	return panes, records, true
}

// cmp orders op references in batch order. As the last key of a sort it
// makes the sort stable without the cost of a stable sort (O(n log² n)
// moves), so a key put twice still keeps its last value.
func (r opRef) cmp(o opRef) int {
	if r.b != o.b {
		return r.b - o.b
	}
	return r.i - o.i
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
	pb.FillPercent, hist.FillPercent, htime.FillPercent = paneFill, historyFill, paneFill
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
	slices.SortFunc(records, func(x, y opRef) int {
		if c := bytes.Compare(keyOf(bs, x), keyOf(bs, y)); c != 0 {
			return c
		}
		return x.cmp(y)
	})
	for _, r := range records {
		if err := put(hist, keyOf(bs, r), bs[r.b].bytes(bs[r.b].ops[r.i].val)); err != nil {
			return err
		}
	}
	slices.SortFunc(records, func(x, y opRef) int {
		if c := bytes.Compare(key2Of(bs, x), key2Of(bs, y)); c != 0 {
			return c
		}
		return x.cmp(y)
	})
	var last []byte
	for _, r := range records {
		k := key2Of(bs, r)
		if bytes.Equal(k, last) {
			continue
		}
		last = k
		if err := st.putDay(htime, k); err != nil {
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

// put seals v, puts it under k into bk and counts them. Every write of
// a commit goes through it, so that every value is sealed (seal.go).
func (st *CommitStats) put(bk *bolt.Bucket, k, v []byte) error {
	st.Puts++
	st.Bytes += len(k) + len(v) + sealSize
	return st.seal.put(bk, k, v)
}

// putDay puts a key of the day index unless it is there: one sensor
// window's records of a day share it, and a put of an existing key would
// still rewrite its page.
func (st *CommitStats) putDay(bk *bolt.Bucket, k []byte) error {
	if bk.Get(k) != nil {
		return nil
	}
	return st.put(bk, k, nil)
}

// paneFill is the panes bucket's fill of split pages: a sensor's new
// panes land just after its older ones, so a split page rarely takes
// more keys on its left. The day index, whose new keys come at its end,
// fills the same way.
const paneFill = 0.95

// historyFill is the history bucket's fill of split pages. A window's
// records are appended after its older ones and never inserted before
// them, so the left page of a split takes no more keys: bbolt's default
// of 50% left history pages about half empty. In BenchmarkHistorySize
// (100 sensors, 30 days) 95% took the file from 22.2 to 15.0 kB a
// sensor-day; 100% gave the same page count as 95%.
const historyFill = 0.95

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
	hist.FillPercent, htime.FillPercent = historyFill, paneFill
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
			// A stored value that fails its seal is simply replaced.
			if old, gerr := get(sensors, bucketSensors, key); gerr != nil || !bytes.Equal(old, val) {
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
		case opSetAside:
			var n int
			n, err = setAside(tx, st, key, len(val) == 1)
			st.Deletes += n
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
				err = st.putDay(htime, b.bytes(o.key2))
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

// bucketSetAside keeps, for forensics, the stored state of sensors whose
// state could not be trusted (Restored.SetAside): id 0x00 bucket name
// 0x00 original key → the bytes as they were found. Made with its first
// key; DropSensor empties a sensor's part.
var bucketSetAside = []byte("set-aside")

func appendSetAsideKey(dst []byte, id string, bucket, key []byte) []byte {
	dst = appendIDPrefix(dst, id)
	dst = append(dst, bucket...)
	return append(append(dst, sep), key...)
}

// setAside moves the window specs and panes of sensor id, and its
// restart time if withRestart, into the set-aside bucket, and returns
// the count of keys moved.
func setAside(tx *bolt.Tx, st *CommitStats, id []byte, withRestart bool) (int, error) {
	dst, err := tx.CreateBucketIfNotExists(bucketSetAside)
	if err != nil {
		return 0, err
	}
	n := 0
	move := func(name, key []byte, prefix bool) error {
		bk := tx.Bucket(name)
		if bk == nil {
			return nil
		}
		c := bk.Cursor()
		for k, v := c.Seek(key); k != nil && (bytes.Equal(k, key) || prefix && bytes.HasPrefix(k, key)); k, v = c.Seek(key) {
			if err := st.put(dst, appendSetAsideKey(nil, string(id), name, k), v); err != nil {
				return err
			}
			if err := c.Delete(); err != nil {
				return err
			}
			n++
		}
		return nil
	}
	if err := move(bucketSensors, id, false); err != nil {
		return n, err
	}
	if err := move(bucketPanes, appendIDPrefix(nil, string(id)), true); err != nil {
		return n, err
	}
	if withRestart {
		if err := move(bucketRestarts, id, false); err != nil {
			return n, err
		}
	}
	return n, nil
}
