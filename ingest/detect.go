package ingest

import (
	"sync"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
	"driftfit/store"
)

// The step and data-quality detectors of a sensor's own rule run on the
// sensor's worker, beside its fits, and report through the sensor's own
// tracker (alert.Tracker.Observe), whose decisions go into the sensor's
// next commit like those of Evaluate:
//
//   - step: a StepDetector per window, fed at each pane close with the
//     closed pane's mean against the window's trend fit at the previous
//     pane close (alert.OneStepError: the fit does not hold the pane);
//     a signal raises step with the change time and size;
//   - spike: each reading's error against the trend fit of the window
//     with the shortest pane, at its last pane close; a reading the
//     SpikeDetector flags is not folded into the fits and is counted in
//     Metrics.Spikes;
//   - out_of_span: every reading, spikes included; flatline: every
//     reading folded;
//   - silent: judged on the worker's clock, the newest reading time the
//     worker applied for any of its sensors, every silenceCheck of that
//     clock. The hot path has no clock of its own, and reading time is
//     what every other decision is judged at, so a replay or a backfill
//     decides as the data happened. The price: a worker none of whose
//     sensors report judges no one silent.
//
// The detectors' own state (the CUSUM sums, the spike scale, the stuck
// run) is kept in memory only: after a restart of the service they build
// up again from the readings that follow.
type detectState struct {
	e    *alertEntry // the sensor's own rule
	wins []detectWin // per window of the rolling.Sensor
	// spikeWin is the window whose fit spikes are judged against (the
	// shortest pane); -1 when the spike detector is off.
	spikeWin int
	flat     alert.FlatlineDetector
	flatOn   bool
	spike    alert.SpikeDetector
	spikeOn  bool
	silent   time.Duration
	span     bool
	lo, hi   float64
	trend    rolling.Model
	// rebaseline restarts the fits from a confirmed step's change time
	// (SensorConfig.StepRebaseline); rebaseFrom is that time, Unix ns,
	// while a restart waits for the end of the pane closes.
	rebaseline bool
	rebaseFrom int64
	// active is the last Active reported per detector kind (per sensor;
	// step, per window, in detectWin).
	active [16]bool
	last   int64 // newest reading folded, Unix ns; 0: none
}

// detectWin is one window's step detector and the fit that predicts its
// next pane.
type detectWin struct {
	spec   rolling.WindowSpec
	stepOn bool
	step   alert.StepDetector
	h      float64
	// fit is the trend fit at the window's last pane close; hasFit says
	// it is set. cov is that solution's coverage.
	fit    rolling.Fit
	hasFit bool
	cov    float64
	// The readings folded since the window's last pane close: count, sum
	// of values, and sum of their times after t0 (ns, as float64).
	n          int
	sum, tsum  float64
	t0         int64
	stepActive bool
}

// silenceCheck is how far the worker's clock moves between two silence
// checks of its sensors (our choice: far below any sensible silence
// time, and at 360 sensors a negligible cost even when a backfill moves
// the clock a month a minute).
const silenceCheck = int64(5 * time.Minute)

// workerQuality is the detector side of a worker.
type workerQuality struct {
	clock     int64        // newest reading time applied, Unix ns
	nextCheck int64        // clock of the next silence check
	silent    []*sensorRef // sensors whose rule sets a silence time
	ok        []rolling.Reading

	// mu guards judgements, which Service.Judgements reads from any
	// goroutine; the worker takes it at pane closes only.
	mu         sync.Mutex
	judgements map[judgeKey]alert.Judgement
}

type judgeKey struct {
	key    string // the entry's store key: id, or id~peers
	window rolling.WindowSpec
}

// serviceQuality is the detector side of a Service.
type serviceQuality struct {
	// savedPeers holds the restored deviation sensors of peer-group
	// members by store id, written by restore and only read after.
	savedPeers map[string]*rolling.Sensor
}

// detectors returns the sensor's detector state, making it on first use
// from its own rule; nil when the rule sets no detector.
func (w *worker) detectors(ref *sensorRef) *detectState {
	as := &ref.st.alerts
	if as.detMade {
		return as.det
	}
	as.detMade = true
	e := w.entry(ref, false)
	if e == nil {
		return nil
	}
	r := e.tr.Rule()
	d := r.Detect
	if !d.Step.On && d.Flatline.For <= 0 && d.Spike.K <= 0 && d.Silent <= 0 && !d.OutOfSpan {
		return nil
	}
	det := &detectState{e: e, spikeWin: -1, silent: d.Silent, span: d.OutOfSpan, lo: r.SpanLower, hi: r.SpanUpper, trend: r.TrendModel}
	var err error
	if d.Flatline.For > 0 {
		if det.flat, err = alert.NewFlatlineDetector(d.Flatline); err == nil {
			det.flatOn = true
		} else {
			w.s.log.Warn().Str("sensor", ref.id).Err(err).Msg("flatline detector refused")
		}
	}
	if d.Spike.K > 0 {
		if det.spike, err = alert.NewSpikeDetector(d.Spike); err == nil {
			det.spikeOn = true
		} else {
			w.s.log.Warn().Str("sensor", ref.id).Err(err).Msg("spike detector refused")
		}
	}
	s := ref.st.sensor
	det.wins = make([]detectWin, s.Windows())
	for i := range det.wins {
		dw := &det.wins[i]
		dw.spec = s.Spec(i)
		if det.spikeOn && (det.spikeWin < 0 || dw.spec.Pane < det.wins[det.spikeWin].spec.Pane) {
			det.spikeWin = i
		}
		if t, ok := s.Newest(i); ok {
			det.last = max(det.last, t.UnixNano())
		}
		if !d.Step.On {
			continue
		}
		for ri, rw := range r.Windows {
			if rw != dw.spec {
				continue
			}
			if ss, ok := e.tr.StepSettings(ri); ok {
				if dw.step, err = alert.NewStepDetector(ss); err == nil {
					dw.stepOn, dw.h = true, dw.step.Settings().H
				} else {
					w.s.log.Warn().Str("sensor", ref.id).Err(err).Msg("step detector refused")
				}
			}
		}
	}
	if det.silent > 0 {
		w.dq.silent = append(w.dq.silent, ref)
	}
	if d.Step.On {
		// Called once per sensor; Options.Sensor is safe for concurrent use.
		if cfg, err := w.s.o.Sensor(ref.id); err == nil {
			det.rebaseline = cfg.StepRebaseline
		}
	}
	as.det = det
	return det
}

// screen judges reading r before it is folded and reports whether it is
// a spike, to be kept out of the fits.
func (w *worker) screen(ref *sensorRef, det *detectState, r rolling.Reading) bool {
	at := time.Unix(0, r.UnixNano)
	// Every reading is checked against the span, a spike too: a reading
	// far beyond the calibrated range is both.
	if det.span {
		if res := alert.SpanCheck(at, r.Value, det.lo, det.hi); res.Active != det.active[alert.OutOfSpan] {
			det.active[alert.OutOfSpan] = res.Active
			w.report(ref, det, at, alert.Finding{Kind: alert.OutOfSpan, Result: res})
		}
	}
	if !det.spikeOn {
		return false
	}
	dw := &det.wins[det.spikeWin]
	if !dw.hasFit {
		return false // nothing to judge against yet
	}
	_, e, ok := alert.OneStepError(&dw.fit, at, r.Value, 1)
	if !ok {
		return false
	}
	res := det.spike.Update(at, e)
	if res.Active != det.active[alert.Spike] {
		det.active[alert.Spike] = res.Active
		w.report(ref, det, at, alert.Finding{Kind: alert.Spike, Result: res.Result, Fit: dw.fitPtr(), Coverage: dw.cov})
	}
	if !res.Spike {
		return false
	}
	if m := w.s.o.Metrics; m != nil && m.Spikes != nil {
		m.Spikes.Inc()
	}
	w.s.badLog.Debug().Str("sensor", ref.id).Int64("t", r.UnixNano).Float64("value", r.Value).Float64("score", res.Score).Msg("spike kept out of the fits")
	return true
}

// observed runs the per-reading detectors on a reading just folded.
func (w *worker) observed(ref *sensorRef, det *detectState, r rolling.Reading) {
	det.last = max(det.last, r.UnixNano)
	for i := range det.wins {
		dw := &det.wins[i]
		if dw.n == 0 {
			dw.t0 = r.UnixNano
		}
		dw.n++
		dw.sum += r.Value
		dw.tsum += float64(r.UnixNano - dw.t0)
	}
	at := time.Unix(0, r.UnixNano)
	if det.flatOn {
		if res := det.flat.Update(at, r.Value); res.Active != det.active[alert.Flatline] {
			det.active[alert.Flatline] = res.Active
			w.report(ref, det, at, alert.Finding{Kind: alert.Flatline, Result: res})
		}
	}
	if det.silent > 0 && det.active[alert.Silent] {
		det.active[alert.Silent] = false
		w.report(ref, det, at, alert.Finding{Kind: alert.Silent, Result: alert.Silence(at, at, det.silent)})
	}
}

// paneClosed feeds window i's step detector with the pane that just
// closed and keeps the window's new trend fit for the next pane and for
// the spike detector.
func (w *worker) paneClosed(ref *sensorRef, det *detectState, i int, sol *rolling.Solution) {
	dw := &det.wins[i]
	if dw.stepOn && dw.hasFit && dw.n > 0 {
		mean := dw.sum / float64(dw.n)
		at := time.Unix(0, dw.t0+int64(dw.tsum/float64(dw.n)))
		if z, e, ok := alert.OneStepError(&dw.fit, at, mean, dw.n); ok {
			res := dw.step.Update(at, z, e)
			if res.Signal || dw.stepActive {
				dw.stepActive = res.Signal
				f := res.Finding(dw.spec, dw.h)
				f.Fit, f.Coverage = dw.fitPtr(), dw.cov
				if res.Signal && det.rebaseline && res.Since.UnixNano() > ref.st.since {
					det.rebaseFrom = max(det.rebaseFrom, res.Since.UnixNano())
				}
				if res.Signal {
					w.s.log.Info().Str("sensor", ref.id).Str("window", alert.WindowName(dw.spec)).Time("since", res.Since).
						Float64("size", res.Size).Int("n", res.Updates).Bool("up", res.Up).Msg("step found")
				}
				w.report(ref, det, sol.Last, f)
			}
		}
	}
	dw.n, dw.sum, dw.tsum = 0, 0, 0
	trend := sol.Fit(det.trend)
	if trend == nil || !trend.OK() {
		trend = &sol.Line
	}
	dw.fit, dw.hasFit, dw.cov = *trend, trend.OK() && sol.N > 0, 0
	if sol.Panes > 0 {
		dw.cov = sol.Coverage()
	}
}

// rebaseline restarts the sensor's fits from the change time of the step
// just confirmed, once its pane closes are done: the windows are emptied
// (their stored panes deleted with the next commit) and readings older
// than the change are refused from then on, as after a calibration, but
// the trackers and their as-left value are kept.
func (w *worker) rebaseline(ref *sensorRef, det *detectState) {
	from := det.rebaseFrom
	det.rebaseFrom = 0
	w.s.log.Info().Str("sensor", ref.id).Time("from", time.Unix(0, from).UTC()).Msg("fits re-baselined after a step")
	w.restart(&restartJob{ref: ref, from: from})
	det.restartWindows()
}

// restartWindows forgets what the detectors learnt of the windows' fits.
func (det *detectState) restartWindows() {
	for i := range det.wins {
		dw := &det.wins[i]
		dw.step.Restart()
		dw.hasFit, dw.n, dw.sum, dw.tsum, dw.stepActive = false, 0, 0, 0, false
	}
}

func (dw *detectWin) fitPtr() *rolling.Fit {
	if !dw.hasFit {
		return nil
	}
	f := dw.fit
	return &f
}

// report applies a detector's finding to the sensor's own tracker and
// queues what it decided.
func (w *worker) report(ref *sensorRef, det *detectState, at time.Time, f alert.Finding) {
	d, err := det.e.tr.Observe(at, f)
	if err != nil {
		w.s.badLog.Warn().Str("sensor", ref.id).Str("kind", f.Kind.String()).Err(err).Msg("detector finding refused")
		return
	}
	if len(d.Events) > 0 || d.Opened != nil {
		w.decided(ref, det.e, d)
	}
}

// folded runs what follows the readings of one message that the sensor
// took: the peer group, and the worker's clock with its silence checks.
func (w *worker) folded(ref *sensorRef, rs []rolling.Reading) {
	if len(rs) == 0 {
		return
	}
	if m := ref.st.member; m != nil {
		w.peerApplied(m, rs)
	}
	q := &w.dq
	for _, r := range rs {
		q.clock = max(q.clock, r.UnixNano)
	}
	if len(q.silent) == 0 || q.clock < q.nextCheck {
		return
	}
	q.nextCheck = q.clock + silenceCheck
	now := time.Unix(0, q.clock)
	for _, sr := range q.silent {
		det := sr.st.alerts.det
		if det == nil || det.last == 0 {
			continue
		}
		res := alert.Silence(now, time.Unix(0, det.last), det.silent)
		if res.Active != det.active[alert.Silent] {
			det.active[alert.Silent] = res.Active
			w.report(sr, det, now, alert.Finding{Kind: alert.Silent, Result: res})
		}
	}
}

// calibrated restarts what a calibration restarts besides the trackers:
// the member's deviation sensor (its stored panes are deleted with the
// next commit) and the detectors.
func (w *worker) calibrated(ref *sensorRef) {
	if m := ref.st.member; m != nil {
		if fresh, err := rolling.NewSensor(specsOf(m.sensor)...); err == nil {
			m.sensor, m.dropped, m.dirty = fresh, true, true
		}
	}
	if det := ref.st.alerts.det; det != nil {
		det.restartWindows()
	}
}

// savePeer puts a member's deviation sensor into b when it changed.
func (w *worker) savePeer(b *store.Batch, ref *sensorRef) error {
	m := ref.st.member
	if m == nil || !m.dirty {
		return nil
	}
	id := peerSensorID(ref.id)
	if m.dropped {
		if err := b.DropPanes(id); err != nil {
			return err
		}
		m.dropped = false
	}
	m.dirty = false
	return b.Sensor(id, m.sensor)
}

// suspect reports whether the sensor's data are suspect now (stuck,
// silent or spiking), so that it stays out of its peer group's
// reference.
func (st *sensorState) suspect() bool {
	d := st.alerts.det
	return d != nil && (d.active[alert.Flatline] || d.active[alert.Spike] || d.active[alert.Silent])
}

// ownEvidence reports whether the sensor has evidence of its own,
// independent of its peer group: a data-quality finding active or a
// step alert firing (alert.PeerEvidence.Own).
func (st *sensorState) ownEvidence() bool {
	d := st.alerts.det
	if d == nil {
		return false
	}
	if d.active[alert.Flatline] || d.active[alert.Spike] || d.active[alert.Silent] || d.active[alert.OutOfSpan] {
		return true
	}
	for _, a := range d.e.tr.Alerts() {
		if a.Kind == alert.Step && a.State == alert.Firing {
			return true
		}
	}
	return false
}

// judged keeps a window's judgement for Service.Judgements and, when its
// verdict changed, counts it by reason and logs it (not a window's first
// verdict when that is too few readings, as every window's is).
func (w *worker) judged(ref *sensorRef, e *alertEntry, j alert.Judgement) {
	if j.Reason == alert.ReasonUnknown {
		return
	}
	k := judgeKey{e.key, j.Window}
	q := &w.dq
	q.mu.Lock()
	if q.judgements == nil {
		q.judgements = map[judgeKey]alert.Judgement{}
	}
	prev, seen := q.judgements[k]
	q.judgements[k] = j
	q.mu.Unlock()
	if seen && prev.Same(j) {
		return
	}
	// Every window starts with too few readings: counted and kept, but
	// a log line per window at start would bury the rest.
	quiet := !seen && j.Reason == alert.TooFewReadings
	if m := w.s.o.Metrics; m != nil && m.NotJudged != nil {
		if seen && !prev.OK() {
			m.NotJudged.WithLabelValues(prev.Reason.String()).Dec()
		}
		if !j.OK() {
			m.NotJudged.WithLabelValues(j.Reason.String()).Inc()
		}
	}
	if quiet {
		return
	}
	w.s.log.Info().Str("sensor", e.key).Str("window", alert.WindowName(j.Window)).Str("reason", j.Reason.String()).
		Int("n", j.N).Int("min_n", j.MinN).Float64("coverage", j.Coverage).Float64("min_coverage", j.MinCoverage).
		Float64("cond", j.Cond).Float64("max_cond", j.MaxCond).Int("live", j.Live).Int("need", j.Need).Msg("window judgement changed")
}

// Judgements calls fn with the latest judgement of every sensor window
// evaluated so far: whether it was judged, or why not (alert.Reason) with
// the numbers behind it. id is the sensor id, or <id>~peers for a peer
// group member's deviation from its group; window is alert.WindowName of
// the window. It is safe for concurrent use: each worker's judgements
// are copied under a lock the worker takes only at pane closes, and fn
// runs outside it, in no particular order.
func (s *Service) Judgements(fn func(id, window string, j alert.Judgement)) {
	type item struct {
		k judgeKey
		j alert.Judgement
	}
	var items []item
	for _, w := range s.workers {
		items = items[:0]
		w.dq.mu.Lock()
		for k, j := range w.dq.judgements {
			items = append(items, item{k, j})
		}
		w.dq.mu.Unlock()
		for _, it := range items {
			fn(it.k.key, alert.WindowName(it.k.window), it.j)
		}
	}
}
