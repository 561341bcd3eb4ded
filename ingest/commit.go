package ingest

import (
	"fmt"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"driftfit/store"
)

// commitToken travels down every worker queue behind the readings of one
// commit; each worker answers with a snapshot of what changed. all asks
// for every changed sensor, whatever the budget (the last commit);
// urgentOnly for the sensors with a decision or calibration waiting alone,
// so that a decision's commit is small.
type commitToken struct {
	parts      chan part
	all        bool
	urgentOnly bool
}

type part struct {
	w     *worker
	batch *store.Batch
	saved uint64        // readings the worker's snapshots hold, ever
	acks  []func(error) // told the commit's outcome
	// pending is the least stream sequence a sensor left out of the
	// snapshot holds unsaved; 0: none. left counts those sensors.
	pending uint64
	left    int
	err     error
}

// ackMark is a stream message the committer can acknowledge once the
// stored position reaches its sequence (acknowledging one acknowledges
// every message before it).
type ackMark struct {
	seq uint64
	msg jetstream.Msg
}

// ackEvery is how many stream messages pass between two ack marks: the
// acknowledgement may lag the stored position by up to that many.
const ackEvery = 64

type commitReq struct {
	tok      *commitToken
	pos      uint64    // stream position of the cut; 0 in direct mode
	bytes    uint64    // Service.streamBytes at the cut
	marks    []ackMark // taken since the last commit, oldest first
	issued   time.Time
	finished chan struct{} // closed once the commit is written (or failed)
}

// commit cuts the stream at the last message handled: every worker
// snapshots its changed sensors once it has applied everything before the
// cut, and the committer writes the snapshots and the position in one
// transaction. It blocks while a commit is queued behind the one
// writing, which is what bounds the work in flight; Run asks
// committerFree first, except for the last commit.
func (s *Service) commit() *commitReq { return s.commitCut(false, false) }

func (s *Service) commitCut(all, urgentOnly bool) *commitReq {
	s.flush()
	tok := &commitToken{parts: make(chan part, len(s.workers)), all: all, urgentOnly: urgentOnly}
	for _, w := range s.workers {
		w.in <- &workBatch{token: tok}
	}
	req := commitReq{tok: tok, issued: time.Now(), finished: make(chan struct{})}
	if s.o.Mode == ModeStream {
		req.pos, req.bytes = s.lastSeq, s.streamBytes
		if s.lastMsg != nil && (len(s.marks) == 0 || s.marks[len(s.marks)-1].seq != s.lastSeq) {
			s.marks = append(s.marks, ackMark{s.lastSeq, s.lastMsg})
		}
		req.marks, s.marks = s.marks, nil
	}
	s.commits <- req
	s.commitBase, s.sinceAck, s.dirty, s.urgent = s.applied.Load(), 0, false, false
	return &req
}

// committerFree reports whether a commit can be queued without waiting.
// A commit writes the sensors touched since the last one, whatever the
// count of readings, so while the committer is busy it is cheaper to keep
// applying and commit more readings at once than to wait: with 10,000
// sensors touched, a commit with fsync takes about 0.3 s on a 2-core VM
// (store's BenchmarkCommit), and waiting on it capped ingest at about
// CommitReadings per commit time. Only the dispatcher sends on s.commits,
// so a free slot cannot fill before commit uses it.
func (s *Service) committerFree() bool { return len(s.commits) < cap(s.commits) }

// snapshot answers a commit token: the changed panes, specs and horizons
// of the sensors touched since their last snapshot, with their alert
// decisions, and the fits recorded at pane closes. It takes every sensor
// with a decision or a calibration waiting, and of the others at most the
// worker's share of CommitMaxSensors, oldest change first; the rest wait
// for the next token. A commit's time grows with the sensors it writes,
// so the budget is what keeps a decision from waiting seconds behind a
// commit of the whole fleet.
func (w *worker) snapshot(tok *commitToken) {
	b := <-w.pool
	var err error
	budget := w.s.budget
	if tok.urgentOnly {
		budget = 0
	}
	rest := w.touch[:0]
	var pending uint64
	for _, ref := range w.touch {
		st := ref.st
		if !tok.all && !st.urgent && budget <= 0 {
			rest = append(rest, ref)
			if st.firstSeq != 0 && (pending == 0 || st.firstSeq < pending) {
				pending = st.firstSeq
			}
			continue
		}
		budget--
		if e := w.save(b, ref); e != nil && err == nil {
			err = e
		}
	}
	clear(w.touch[len(rest):])
	w.touch = rest
	for i := range w.hist {
		h := &w.hist[i]
		if e := b.Record(h.ref.id, &h.sol); e != nil && err == nil {
			err = fmt.Errorf("fit record of %s: %w", h.ref.id, e)
		}
	}
	clear(w.hist)
	w.hist = w.hist[:0]
	var acks []func(error)
	for _, a := range w.taken {
		acks = append(acks, a...)
	}
	clear(w.taken)
	w.taken = w.taken[:0]
	tok.parts <- part{w: w, batch: b, saved: w.saved, acks: acks, pending: pending, left: len(rest), err: err}
}

// save puts one sensor's changes into b and clears its marks.
func (w *worker) save(b *store.Batch, ref *sensorRef) error {
	st := ref.st
	var err error
	keep := func(e error) {
		if e != nil && err == nil {
			err = fmt.Errorf("sensor %s: %w", ref.id, e)
		}
	}
	if st.dropped {
		st.dropped = false
		keep(b.DropPanes(ref.id))
		keep(b.SetRestart(ref.id, st.since))
	} else if st.cutMoved {
		keep(b.SetRestart(ref.id, st.since))
	}
	st.cutMoved = false
	keep(b.Sensor(ref.id, st.sensor))
	keep(w.savePeer(b, ref))
	if st.lastSeq != 0 && st.lastSeq != st.savedSeq {
		keep(b.SetSeq(ref.id, st.lastSeq))
		st.savedSeq = st.lastSeq
	}
	for _, out := range st.outs {
		keep(b.Alerts(out))
	}
	clear(st.outs)
	st.outs = st.outs[:0]
	if len(st.acks) > 0 {
		w.taken = append(w.taken, st.acks)
		st.acks = nil
	}
	w.saved += st.unsaved
	st.touched, st.urgent, st.firstSeq, st.unsaved = false, false, 0, 0
	return err
}

// committer writes commits in order, then acknowledges them on the bus.
// It is the only writer of the DB while the service runs.
func (s *Service) committer() {
	var pruneNext, thinNext time.Time
	var marks []ackMark
	var stored uint64
	for req := range s.commits {
		parts := make([]part, 0, len(s.workers))
		applied := s.appliedBase
		pos := req.pos
		left := 0
		var err error
		for range s.workers {
			p := <-req.tok.parts
			parts = append(parts, p)
			applied += p.saved
			left += p.left
			if p.pending != 0 && p.pending <= pos {
				pos = p.pending - 1 // a sensor left out holds that message unsaved
			}
			if p.err != nil && err == nil {
				err = p.err
			}
		}
		marks = append(marks, req.marks...)
		batches := make([]*store.Batch, len(parts))
		for i := range parts {
			batches[i] = parts[i].batch
		}
		stored = s.position.Load() // a start with ResetPosition lowers it after this goroutine began
		if pos < stored {
			pos = stored // a position never moves back
		}
		if pos != 0 {
			batches[0].SetPosition(pos)
		}
		batches[0].SetApplied(applied)
		for _, it := range s.outbox.takeDone() {
			batches[0].OutboxDone(it.Lane, it.Seq)
		}
		var st store.CommitStats
		t0 := time.Now()
		if err == nil {
			st, err = s.o.DB.Commit(batches...)
		}
		for _, p := range parts {
			p.w.pool <- p.batch
		}
		if err != nil {
			err = fmt.Errorf("ingest: commit at position %d: %w", pos, err)
			for _, p := range parts {
				for _, a := range p.acks {
					a(err)
				}
			}
			// The file keeps the last good commit; Run stops, and a
			// restart resumes from that commit's position.
			s.fail(err)
			close(req.finished)
			wake(s.freed)
			continue
		}
		s.outbox.committed(st.Outbox)
		for _, p := range parts {
			for _, a := range p.acks {
				a(nil)
			}
		}
		took := time.Since(t0)
		if pos != 0 {
			s.position.Store(pos)
			stored = pos
		}
		if m := s.o.Metrics; m != nil {
			m.CommitTime.Observe(took.Seconds())
			m.CommitBytes.Add(float64(st.Bytes))
		}
		s.log.Debug().Uint64("position", pos).Int("bytes", st.Bytes).Int("puts", st.Puts).Dur("took", took).Msg("committed")
		// Acknowledge the newest mark the stored position covers: the bus
		// may then forget what the file holds.
		n := 0
		for n < len(marks) && marks[n].seq <= pos {
			n++
		}
		if n > 0 {
			if err := marks[n-1].msg.Ack(); err != nil {
				s.log.Warn().Err(err).Uint64("position", marks[n-1].seq).Msg("acknowledgement not sent")
			}
			marks = append(marks[:0], marks[n:]...)
		}
		s.purgeTo(purgeReq{seq: pos, bytes: req.bytes}) // the stored position: every message up to it is in the file
		if r := s.o.HistoryRetention; r > 0 && !time.Now().Before(pruneNext) {
			n, more, err := s.o.DB.PruneHistory(s.o.Now().Add(-r), 500)
			switch {
			case err != nil:
				s.log.Error().Err(err).Msg("history retention")
				pruneNext = time.Now().Add(time.Minute)
			case more:
				// Keep going, one small chunk per commit.
			default:
				pruneNext = time.Now().Add(time.Minute)
			}
			if n > 0 {
				s.log.Debug().Int("n", n).Msg("old fit history deleted")
			}
		}
		if a, to := s.o.HistoryThinAfter, s.o.HistoryThinTo; a > 0 && to > 0 && !time.Now().Before(thinNext) {
			n, more, err := s.o.DB.ThinHistory(s.o.Now().Add(-a), to, 500)
			switch {
			case err != nil:
				s.log.Error().Err(err).Msg("history thinning")
				thinNext = time.Now().Add(time.Minute)
			case more:
				// Keep going, one small chunk per commit.
			default:
				thinNext = time.Now().Add(time.Minute)
			}
			if n > 0 {
				s.log.Debug().Int("n", n).Msg("fit history thinned")
			}
		}
		for _, e := range st.SetAside {
			s.badLog.Error().Str("sensor", e.Sensor).Err(e.Err).Msg("sensor left out of the commit: its state fails the checks a restore applies")
			if m := s.o.Metrics; m != nil {
				m.SetAside.Inc()
			}
		}
		s.backlog.Store(left > 0)
		close(req.finished)
		wake(s.freed)
	}
}

// fail reports a fatal error to Run once.
func (s *Service) fail(err error) {
	select {
	case s.fatal <- err:
	default:
	}
}
