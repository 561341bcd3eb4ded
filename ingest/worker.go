package ingest

import (
	"errors"
	"time"

	"github.com/nats-io/nats.go"

	"driftfit/rolling"
	"driftfit/store"
)

// job is the readings of one message for one sensor, within a workBatch.
type job struct {
	ref    *sensorRef
	off, n int // range in workBatch.readings
}

// workBatch is one hand-off from the dispatcher to a worker: jobs to
// apply, or a commit token.
type workBatch struct {
	jobs     []job
	readings []rolling.Reading
	token    *commitToken
	restart  *restartJob
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

	applied uint64 // readings applied, ever; read at commit tokens
}

type histEntry struct {
	ref *sensorRef
	sol rolling.Solution
}

func newWorker(s *Service, idx int) *worker {
	w := &worker{
		s:    s,
		idx:  idx,
		in:   make(chan *workBatch, workQueueLen),
		free: make(chan *workBatch, workQueueLen+2),
		pool: make(chan *store.Batch, 2),
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
			w.apply(&b.jobs[i], b.readings)
		}
		clear(b.jobs) // drop the refs
		b.jobs, b.readings = b.jobs[:0], b.readings[:0]
		select {
		case w.free <- b:
		default:
		}
	}
}

func (w *worker) apply(j *job, readings []rolling.Reading) {
	ref, st := j.ref, j.ref.st
	if !st.touched {
		st.touched = true
		w.touch = append(w.touch, ref)
	}
	var ok uint64
	rs := readings[j.off : j.off+j.n]
	for _, r := range rs {
		if r.UnixNano < st.since {
			w.reject(ref, r, errBeforeRestart)
			continue
		}
		if mask := st.sensor.Closes(r.UnixNano); mask != 0 {
			w.closePanes(ref, mask)
		}
		if err := st.sensor.Add(r); err != nil {
			w.reject(ref, r, err)
			continue
		}
		ok++
	}
	w.applied += ok
	w.s.applied.Add(ok)
	if m := w.s.o.Metrics; m != nil {
		m.Applied.Add(float64(ok))
	}
	if f := w.s.o.OnApplied; f != nil {
		f(ref.id, rs)
	}
}

// restartJob empties a sensor's windows; see Service.Restart.
type restartJob struct {
	ref  *sensorRef
	from int64
}

// errBeforeRestart is the cause of a reading refused because it is older
// than the sensor's last restart.
var errBeforeRestart = errors.New("ingest: reading older than the sensor's last calibration")

func (w *worker) restart(j *restartJob) {
	st := j.ref.st
	specs := make([]rolling.WindowSpec, st.sensor.Windows())
	for i := range specs {
		specs[i] = st.sensor.Spec(i)
	}
	fresh, err := rolling.NewSensor(specs...)
	if err != nil {
		return // the specs came from a working sensor
	}
	st.sensor, st.since, st.dropped = fresh, j.from, true
	if !st.touched {
		st.touched = true
		w.touch = append(w.touch, j.ref)
	}
	w.s.log.Info().Str("sensor", j.ref.id).Time("from", time.Unix(0, j.from)).Msg("fits restarted")
}

// closePanes records the fit of every window whose newest pane the next
// reading will close.
func (w *worker) closePanes(ref *sensorRef, mask uint64) {
	for i := range ref.st.sensor.Windows() {
		if mask&(1<<uint(i)) == 0 {
			continue
		}
		w.hist = append(w.hist, histEntry{ref: ref, sol: ref.st.sensor.Solve(i)})
		if f := w.s.o.OnPaneClose; f != nil {
			f(ref.id, i, &w.hist[len(w.hist)-1].sol)
		}
	}
}

// reject dead-letters one reading the sensor refused.
func (w *worker) reject(ref *sensorRef, r rolling.Reading, err error) {
	reason := ReasonTooOld
	if !errors.Is(err, rolling.ErrTooOld) && !errors.Is(err, errBeforeRestart) {
		reason = ReasonUnknown
	}
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
