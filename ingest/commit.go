package ingest

import (
	"fmt"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"driftfit/store"
)

// commitToken travels down every worker queue behind the readings of one
// commit; each worker answers with a snapshot of what changed.
type commitToken struct {
	parts chan part
}

type part struct {
	w       *worker
	batch   *store.Batch
	applied uint64
	acks    []func(error) // told the commit's outcome
	err     error
}

type commitReq struct {
	tok      *commitToken
	pos      uint64 // stream position the state corresponds to; 0 in direct mode
	ack      jetstream.Msg
	issued   time.Time
	finished chan struct{} // closed once the commit is written (or failed)
}

// commit cuts the stream at the last message handled: every worker
// snapshots its changed sensors once it has applied everything before the
// cut, and the committer writes the snapshots and the position in one
// transaction. It blocks while a commit is queued behind the one
// writing, which is what bounds the work in flight; Run asks
// committerFree first, except for the last commit.
func (s *Service) commit() *commitReq {
	s.flush()
	tok := &commitToken{parts: make(chan part, len(s.workers))}
	for _, w := range s.workers {
		w.in <- &workBatch{token: tok}
	}
	req := commitReq{tok: tok, issued: time.Now(), finished: make(chan struct{})}
	if s.o.Mode == ModeStream {
		req.pos, req.ack = s.lastSeq, s.lastMsg
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
// of the sensors touched since the last token, and the fits recorded at
// pane closes.
func (w *worker) snapshot(tok *commitToken) {
	b := <-w.pool
	var err error
	for _, ref := range w.touch {
		ref.st.touched = false
		if ref.st.dropped {
			ref.st.dropped = false
			if e := b.DropPanes(ref.id); e != nil && err == nil {
				err = fmt.Errorf("sensor %s: %w", ref.id, e)
			}
			if e := b.SetRestart(ref.id, ref.st.since); e != nil && err == nil {
				err = fmt.Errorf("sensor %s: %w", ref.id, e)
			}
		}
		if e := b.Sensor(ref.id, ref.st.sensor); e != nil && err == nil {
			err = fmt.Errorf("sensor %s: %w", ref.id, e)
		}
	}
	clear(w.touch)
	w.touch = w.touch[:0]
	for i := range w.hist {
		h := &w.hist[i]
		if e := b.Record(h.ref.id, &h.sol); e != nil && err == nil {
			err = fmt.Errorf("fit record of %s: %w", h.ref.id, e)
		}
	}
	clear(w.hist)
	w.hist = w.hist[:0]
	for _, out := range w.outs {
		if e := b.Alerts(out); e != nil && err == nil {
			err = fmt.Errorf("alert state of %s: %w", out.Sensor, e)
		}
	}
	clear(w.outs)
	w.outs = w.outs[:0]
	acks := w.acks
	w.acks = nil
	tok.parts <- part{w: w, batch: b, applied: w.applied, acks: acks, err: err}
}

// committer writes commits in order, then acknowledges them on the bus.
// It is the only writer of the DB while the service runs.
func (s *Service) committer() {
	var pruneNext time.Time
	var acked uint64
	for req := range s.commits {
		parts := make([]part, 0, len(s.workers))
		applied := s.appliedBase
		var err error
		for range s.workers {
			p := <-req.tok.parts
			parts = append(parts, p)
			applied += p.applied
			if p.err != nil && err == nil {
				err = p.err
			}
		}
		batches := make([]*store.Batch, len(parts))
		for i := range parts {
			batches[i] = parts[i].batch
		}
		if req.pos != 0 {
			batches[0].SetPosition(req.pos)
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
			err = fmt.Errorf("ingest: commit at position %d: %w", req.pos, err)
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
		if req.pos != 0 {
			s.position.Store(req.pos)
		}
		if m := s.o.Metrics; m != nil {
			m.CommitTime.Observe(took.Seconds())
			m.CommitBytes.Add(float64(st.Bytes))
		}
		s.log.Debug().Uint64("position", req.pos).Int("bytes", st.Bytes).Int("puts", st.Puts).Dur("took", took).Msg("committed")
		if req.ack != nil && req.pos > acked {
			acked = req.pos
			if err := req.ack.Ack(); err != nil {
				s.log.Warn().Err(err).Uint64("position", req.pos).Msg("acknowledgement not sent")
			}
		}
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
