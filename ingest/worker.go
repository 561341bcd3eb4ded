package ingest

import (
	"errors"
	"fmt"
	"time"

	"github.com/nats-io/nats.go"

	"driftfit/alert"
	"driftfit/rolling"
	"driftfit/store"
)

// job is one message for one sensor, within a workBatch.
type job struct {
	ref  *sensorRef
	data []byte // the payload, owned by the job
	seq  uint64 // stream sequence; 0 in direct mode
	// counted: the job is in ref.inflight (the sensor was not yet made)
	counted bool
}

// workBatch is one hand-off from the dispatcher to a worker: jobs to
// apply, or a commit token.
type workBatch struct {
	jobs    []job
	token   *commitToken
	restart *restartJob
}

// worker owns a share of the sensors: it alone touches their state.
type worker struct {
	s     *Service
	idx   int
	in    chan *workBatch
	free  chan *workBatch   // emptied batches back to the dispatcher
	pool  chan *store.Batch // two store batches: one filling, one committing
	touch []*sensorRef      // sensors changed since the last commit token
	hist  []histEntry       // pane-close solutions since the last token
	dec   Decoder
	rs    []rolling.Reading // the accepted readings of one message
	warm  uint64            // keeps Sensor.Warm's loads

	groups map[string]*peerGroup // the peer groups routed here
	taken  [][]func(error)       // answers of the sensors in the snapshot being made

	saved uint64 // readings applied and snapshotted, ever; read at commit tokens

	dq workerQuality // detectors' clock, judgements (detect.go)

	cals map[string]*calLog // calibration records of the sensors asked about (calrecord.go)
}

type histEntry struct {
	ref *sensorRef
	sol rolling.Solution
}

func newWorker(s *Service, idx int) *worker {
	w := &worker{
		s:      s,
		idx:    idx,
		in:     make(chan *workBatch, workQueueLen),
		free:   make(chan *workBatch, workQueueLen+2),
		pool:   make(chan *store.Batch, 2),
		dec:    Decoder{MaxBytes: s.o.MaxPayload},
		groups: map[string]*peerGroup{},
	}
	w.pool <- new(store.Batch)
	w.pool <- new(store.Batch)
	return w
}

// getBatch returns an empty hand-off, reusing one the worker finished.
func (w *worker) getBatch() *workBatch {
	select {
	case b := <-w.free:
		return b
	default:
		return &workBatch{}
	}
}

func (w *worker) run() {
	for b := range w.in {
		if b.token != nil {
			w.snapshot(b.token)
			continue
		}
		if b.restart != nil {
			w.restart(b.restart)
			continue
		}
		for i := range b.jobs {
			if s := b.jobs[i].ref.st.sensor; s != nil {
				w.warm += s.Warm()
			}
		}
		limit := w.s.o.Now().Add(w.s.o.FutureSkew).UnixNano()
		for i := range b.jobs {
			w.apply(&b.jobs[i], limit)
			if b.jobs[i].counted {
				b.jobs[i].ref.inflight.Add(-1)
			}
		}
		clear(b.jobs) // drop the refs and payloads
		b.jobs = b.jobs[:0]
		select {
		case w.free <- b:
		default:
		}
	}
}

// apply decodes and validates one message and folds its readings into
// the sensor; readings later than limit (Unix ns) are refused as future.
// Refused input goes to the dead letters; the rest is kept.
func (w *worker) apply(j *job, limit int64) {
	ref := j.ref
	if j.seq != 0 && j.seq <= ref.st.savedSeq {
		return // held by the sensor's stored state, which a commit wrote ahead of the position
	}
	p, err := w.dec.Decode(j.data)
	if err != nil {
		reason := ReasonMalformed
		var pe *PayloadError
		if errors.As(err, &pe) {
			reason = pe.Reason
		}
		w.s.deadLetter(w.s.prefix+ref.id, j.data, reason, err, nil)
		return
	}
	if p.Sensor != nil && string(p.Sensor) != ref.id {
		w.s.deadLetter(w.s.prefix+ref.id, j.data, ReasonMalformed, fmt.Errorf("payload sensor %q differs from subject sensor %q", p.Sensor, ref.id), nil)
		return
	}
	rejects := p.Rejects
	rs := w.rs[:0]
	for i := range p.Readings {
		d := &p.Readings[i]
		switch {
		case d.UnixNano > limit:
			rejects = append(rejects, Reject{Index: payloadIndex(p, i), Field: "t", Value: time.Unix(0, d.UnixNano).UTC().Format(time.RFC3339Nano),
				Reason: ReasonFutureTime, Err: fmt.Errorf("time more than %v ahead of now", w.s.o.FutureSkew)})
			continue
		case d.Unit != nil && ref.unit != "" && string(d.Unit) != ref.unit:
			rejects = append(rejects, Reject{Index: payloadIndex(p, i), Field: "unit", Value: string(d.Unit),
				Reason: ReasonUnitMismatch, Err: fmt.Errorf("sensor %s is configured in %s", ref.id, ref.unit)})
			continue
		}
		v := d.Value
		if d.HasRef {
			v -= d.Ref
		}
		rs = append(rs, rolling.Reading{UnixNano: d.UnixNano, Value: v})
	}
	w.rs = rs
	if len(rs) > 0 && ref.st.sensor == nil {
		sensor, err := rolling.NewSensor(ref.st.windows...)
		if err != nil {
			w.s.deadLetter(w.s.prefix+ref.id, j.data, ReasonMalformed, fmt.Errorf("sensor %q windows: %w", ref.id, err), nil)
			return
		}
		if err := w.s.admitSensor(ref); err != nil {
			w.s.deadLetter(w.s.prefix+ref.id, j.data, ReasonTooManySensors, err, nil)
			return
		}
		ref.st.sensor = sensor
	}
	if len(rs) > 0 && !ref.st.joined {
		ref.st.joined = true
		if ref.group != "" {
			w.join(ref, ref.group, specsOf(ref.st.sensor))
		}
	}
	if len(rs) > 0 {
		w.fold(ref, rs, j.seq)
	}
	if len(rejects) > 0 {
		w.s.deadLetter(w.s.prefix+ref.id, j.data, rejects[0].Reason, rejects[0].Err, rejects)
	}
}

// payloadIndex returns the payload position of accepted reading i: the
// decoder lists accepted readings in order, skipping the refused ones.
func payloadIndex(p Payload, i int) int {
	idx := i
	for _, r := range p.Rejects {
		if r.Index <= idx {
			idx++
		}
	}
	return idx
}

// mark lists the sensor for the next snapshot.
func (w *worker) mark(ref *sensorRef) {
	if !ref.st.touched {
		ref.st.touched = true
		w.touch = append(w.touch, ref)
	}
}

// fold adds accepted readings of the message seq to the sensor.
func (w *worker) fold(ref *sensorRef, rs []rolling.Reading, seq uint64) {
	st := ref.st
	w.mark(ref)
	if seq != 0 {
		if st.firstSeq == 0 {
			st.firstSeq = seq
		}
		st.lastSeq = seq
	}
	var ok uint64
	det := w.detectors(ref)
	taken := w.dq.ok[:0]
	for _, r := range rs {
		if st.since != 0 && r.UnixNano < st.since { // since 0: never restarted
			w.reject(ref, r, errBeforeRestart)
			continue
		}
		if err := w.s.admit(st, r.UnixNano); err != nil {
			w.reject(ref, r, err)
			continue
		}
		if det != nil && w.screen(ref, det, r) {
			continue // a spike: kept out of the fits
		}
		if mask := st.sensor.Closes(r.UnixNano); mask != 0 {
			w.closePanes(ref, mask)
		}
		if err := st.sensor.Add(r); err != nil {
			w.reject(ref, r, err)
			continue
		}
		ok++
		taken = append(taken, r)
		if det != nil {
			w.observed(ref, det, r)
		}
	}
	w.dq.ok = taken
	st.unsaved += ok
	w.s.applied.Add(ok)
	if m := w.s.o.Metrics; m != nil {
		m.Applied.Add(float64(ok))
	}
	w.folded(ref, taken)
	if f := w.s.o.OnApplied; f != nil {
		f(ref.id, rs)
	}
}

// specsOf returns the window specs of s.
func specsOf(s *rolling.Sensor) []rolling.WindowSpec {
	specs := make([]rolling.WindowSpec, s.Windows())
	for i := range specs {
		specs[i] = s.Spec(i)
	}
	return specs
}

// restartJob empties a sensor's windows, after applying a calibration
// to its alert trackers when cal is set; see Service.Restart and
// Service.Calibrate. With amend set it voids or corrects a calibration
// instead (cal holding the correction). done, if set, learns the
// outcome: an error at once, or that of the commit storing it; out, if
// set, is given the calibration record before done is queued.
type restartJob struct {
	ref   *sensorRef
	from  int64
	cal   *alert.Calibration
	amend *amendment
	at    time.Time // when the request came (the record's time)
	out   *CalibrationRecord
	done  func(error)
}

// amendment names the calibration a void (void) or a correction
// (correct) applies to, one of them non-zero.
type amendment struct {
	void, correct uint64
	reason        string
	at            time.Time
}

// errBeforeRestart is the cause of a reading refused because it is older
// than the sensor's last restart.
var errBeforeRestart = errors.New("ingest: reading older than the sensor's last calibration")

func (w *worker) restart(j *restartJob) {
	done := j.done
	if done == nil {
		done = func(error) {}
	}
	switch {
	case j.amend != nil && j.amend.void != 0:
		w.void(j, done)
		return
	case j.amend != nil:
		w.correct(j, done)
		return
	}
	fresh, err := w.freshSensor(j.ref)
	if err != nil {
		done(err)
		return
	}
	if j.cal != nil {
		l, err := w.calLog(j.ref)
		if err != nil {
			done(err)
			return
		}
		undo, closed, err := w.calibrate(j.ref, *j.cal)
		if err != nil {
			done(err)
			return
		}
		undo.Cutoff, undo.Set = j.ref.st.since, j.from
		rec := w.recordCalibration(j.ref, l, *j.cal, j.at, undo, closed)
		if j.out != nil {
			*j.out = rec
		}
		w.s.log.Info().Str("sensor", j.ref.id).Uint64("calibration", rec.Seq).Float64("as_found", j.cal.AsFound).Float64("as_left", j.cal.AsLeft).
			Time("at", j.cal.Time).Bool("alert_rule", j.ref.st.alerts.entry[0] != nil).Msg("calibration recorded")
	}
	w.settled(j.ref, done)
	w.restartFits(j.ref, fresh, j.from)
}

// freshSensor returns empty windows of the sensor's specs.
func (w *worker) freshSensor(ref *sensorRef) (*rolling.Sensor, error) {
	specs := ref.st.windows
	if ref.st.sensor != nil {
		specs = specsOf(ref.st.sensor)
	}
	fresh, err := rolling.NewSensor(specs...)
	if err != nil {
		w.s.log.Warn().Str("sensor", ref.id).Err(err).Msg("fits not restarted: windows refused")
		return nil, fmt.Errorf("sensor %s: windows: %w", ref.id, err)
	}
	return fresh, nil
}

// restartFits puts fresh in place of the sensor's windows and refuses
// readings older than from (Unix ns) from now on; the next commit
// deletes the stored panes and stores the cutoff.
func (w *worker) restartFits(ref *sensorRef, fresh *rolling.Sensor, from int64) {
	st := ref.st
	if st.sensor == nil {
		w.s.sensorMade(ref)
	}
	st.sensor, st.since, st.dropped = fresh, from, true
	st.dedup = Dedup{} // the fresh sensor holds none of the readings seen
	w.mark(ref)
	w.s.log.Info().Str("sensor", ref.id).Time("from", time.Unix(0, from)).Msg("fits restarted")
}

// closePanes records the fit of every window whose newest pane the next
// reading will close.
func (w *worker) closePanes(ref *sensorRef, mask uint64) {
	for i := range ref.st.sensor.Windows() {
		if mask&(1<<uint(i)) == 0 {
			continue
		}
		w.hist = append(w.hist, histEntry{ref: ref, sol: ref.st.sensor.Solve(i)})
		sol := &w.hist[len(w.hist)-1].sol
		if f := w.s.o.OnPaneClose; f != nil {
			f(ref.id, i, sol)
		}
		if !ref.st.comparing() { // else judged on its deviation from the group
			if sol.Parabola.Pairs < rolling.MinPairs {
				// Too few readings to estimate their serial correlation:
				// judge with the estimate of a longer window.
				j := ref.st.sensor.SolveJudged(i)
				w.judge(ref, false, &j)
			} else {
				w.judge(ref, false, sol)
			}
		}
		if det := ref.st.alerts.det; det != nil {
			w.paneClosed(ref, det, i, sol)
		}
	}
	if det := ref.st.alerts.det; det != nil && det.rebaseFrom != 0 {
		w.rebaseline(ref, det)
	}
}

// reject dead-letters one reading the sensor refused.
func (w *worker) reject(ref *sensorRef, r rolling.Reading, err error) {
	reason := foldReason(err)
	msg := nats.NewMsg(w.s.o.RejectedSubject)
	msg.Data = AppendReading(nil, Decoded{Reading: r})
	msg.Header.Set(HeaderReason, reason.String())
	msg.Header.Set(HeaderError, err.Error())
	msg.Header.Set(HeaderSubject, w.s.prefix+ref.id)
	w.s.rejected.Add(1)
	if m := w.s.o.Metrics; m != nil {
		m.Rejected.WithLabelValues(reason.String()).Inc()
	}
	w.s.badLog.Warn().Str("sensor", ref.id).Str("reason", reason.String()).Int64("t", r.UnixNano).Err(err).Msg("reading rejected")
	if perr := w.s.o.Conn.PublishMsg(msg); perr != nil {
		w.s.badLog.Error().Err(perr).Str("subject", msg.Subject).Msg("dead letter not published")
	}
}
