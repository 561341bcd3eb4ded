package ingest

import (
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"strconv"
	"time"

	"driftfit/alert"
	"driftfit/rolling"
	"driftfit/store"
)

// CalibrationRecord is one calibration of a sensor as the service keeps
// it: the stored record (store.DB.Calibrations, JSON) and what the
// listing shows. Records are never deleted: a voided or corrected one
// stays, marked.
type CalibrationRecord struct {
	Sensor string `json:"sensor"`
	// Seq numbers the sensor's calibrations from 1 in the order they were
	// recorded; a correction is recorded under a number of its own.
	Seq     uint64    `json:"seq"`
	Time    time.Time `json:"time"` // when the work was done
	AsFound float64   `json:"as_found"`
	AsLeft  float64   `json:"as_left"`
	// Recorded is when the service stored it, by its clock.
	Recorded time.Time `json:"recorded"`
	// Status is CalibrationRecorded, CalibrationVoided or
	// CalibrationCorrected.
	Status string `json:"status"`
	// Changed is when it was voided or corrected, Reason the reason given
	// then ("" if none).
	Changed time.Time `json:"changed,omitzero"`
	Reason  string    `json:"reason,omitempty"`
	// Corrects is the number of the record this one replaced;
	// CorrectedBy that of the record that replaced this one (0: none).
	Corrects    uint64 `json:"corrects,omitempty"`
	CorrectedBy uint64 `json:"corrected_by,omitempty"`
	// Closed lists the tickets it closed; Reopened those its voiding
	// reopened.
	Closed   []string `json:"closed,omitempty"`
	Reopened []string `json:"reopened,omitempty"`
}

// Calibration record statuses (CalibrationRecord.Status).
const (
	CalibrationRecorded  = "recorded"
	CalibrationVoided    = "voided"
	CalibrationCorrected = "corrected"
)

// DecodeCalibrationRecord decodes a stored calibration record.
func DecodeCalibrationRecord(data []byte) (CalibrationRecord, error) {
	var r CalibrationRecord
	if err := json.Unmarshal(data, &r); err != nil {
		return r, fmt.Errorf("ingest: calibration record: %w", err)
	}
	if r.Sensor == "" || r.Seq == 0 {
		return r, fmt.Errorf("ingest: calibration record: no sensor or number")
	}
	return r, nil
}

// MaxReason is the longest reason for a void or correction accepted, in
// bytes.
const MaxReason = 500

// CalibrationRefError is returned for a void or correction that names a
// calibration which does not exist or is not the sensor's latest in
// force. It unwraps to ErrNoCalibration or ErrNotInForce.
type CalibrationRefError struct {
	Sensor  string
	Seq     uint64
	Problem string
	Err     error
}

func (e *CalibrationRefError) Error() string {
	return "ingest: calibration " + strconv.FormatUint(e.Seq, 10) + " of sensor " + QuoteID(e.Sensor) + ": " + e.Problem
}

// Unwrap returns ErrNoCalibration or ErrNotInForce.
func (e *CalibrationRefError) Unwrap() error { return e.Err }

// storedCalibration is the stored form of a record: the record and what
// withdrawing it restores.
type storedCalibration struct {
	CalibrationRecord
	Undo calUndo `json:"undo"`
	// damaged: the stored bytes did not read back (only numbered).
	damaged bool
}

// calUndo is what a calibration replaced: the readings cutoff before it
// (Unix ns, 0: none), the one it set, and its trackers' prior states
// (nil: no tracker then).
type calUndo struct {
	Cutoff int64        `json:"cutoff_ns"`
	Set    int64        `json:"set_ns"`
	Own    *alert.Prior `json:"own,omitempty"`
	Peer   *alert.Prior `json:"peer,omitempty"`
}

// calLog is the calibration records of one sensor, by number; the
// sensor's worker owns it. It is read from the store on the sensor's
// first calibration request and kept, so that the numbers and the
// records not yet committed are always known.
type calLog struct {
	recs []storedCalibration // ascending Seq
}

// calLog returns the calibration records of ref's sensor.
func (w *worker) calLog(ref *sensorRef) (*calLog, error) {
	if l := w.cals[ref.id]; l != nil {
		return l, nil
	}
	l := &calLog{}
	err := w.s.o.DB.Calibrations(ref.id, func(_ string, n uint64, data []byte) error {
		rec := storedCalibration{CalibrationRecord: CalibrationRecord{Sensor: ref.id, Seq: n}}
		if data == nil || json.Unmarshal(data, &rec) != nil || rec.Seq != n {
			rec = storedCalibration{CalibrationRecord: CalibrationRecord{Sensor: ref.id, Seq: n}, damaged: true}
		}
		l.recs = append(l.recs, rec)
		return nil
	})
	var skipped *store.SkippedError
	if errors.As(err, &skipped) {
		w.s.log.Error().Str("sensor", ref.id).Err(err).Msg("calibration records damaged; their numbers stay taken")
	} else if err != nil {
		return nil, fmt.Errorf("ingest: calibration records of %s: %w", QuoteID(ref.id), err)
	}
	if w.cals == nil {
		w.cals = map[string]*calLog{}
	}
	w.cals[ref.id] = l
	return l, nil
}

// next returns the number of the next record.
func (l *calLog) next() uint64 {
	if len(l.recs) == 0 {
		return 1
	}
	return l.recs[len(l.recs)-1].Seq + 1
}

// inForce returns the index of record seq of sensor id when it is the
// sensor's latest in force, else a *CalibrationRefError saying why not.
func (l *calLog) inForce(id string, seq uint64) (int, error) {
	refErr := func(sentinel error, format string, a ...any) error {
		return &CalibrationRefError{Sensor: id, Seq: seq, Problem: fmt.Sprintf(format, a...), Err: sentinel}
	}
	i, found := slices.BinarySearchFunc(l.recs, seq, func(r storedCalibration, n uint64) int {
		switch {
		case r.Seq < n:
			return -1
		case r.Seq > n:
			return 1
		}
		return 0
	})
	if !found {
		if len(l.recs) == 0 {
			return 0, refErr(ErrNoCalibration, "none recorded: the sensor has no calibrations")
		}
		return 0, refErr(ErrNoCalibration, "none recorded: its calibrations are numbered %d to %d", l.recs[0].Seq, l.recs[len(l.recs)-1].Seq)
	}
	r := &l.recs[i]
	switch {
	case r.damaged:
		return 0, refErr(ErrNoCalibration, "its stored record is damaged")
	case r.Status == CalibrationVoided:
		return 0, refErr(ErrNotInForce, "already voided at %s", r.Changed.UTC().Format(time.RFC3339))
	case r.Status == CalibrationCorrected:
		return 0, refErr(ErrNotInForce, "already corrected at %s by calibration %d", r.Changed.UTC().Format(time.RFC3339), r.CorrectedBy)
	}
	for _, later := range l.recs[i+1:] {
		if later.damaged || later.Status == CalibrationRecorded {
			return 0, refErr(ErrNotInForce, "calibration %d was recorded after it: void or correct %d first", later.Seq, later.Seq)
		}
	}
	return i, nil
}

// holds reports whether the sensor's state is still the one calibration
// rec left (or a correction of it): its own tracker's calibration time,
// or without one its readings cutoff. A sensor dropped since
// (drop-sensor), or whose stored alert state was unreadable, no longer
// holds it, and withdrawing it would put back a state from before that.
func (w *worker) holds(ref *sensorRef, rec *storedCalibration) bool {
	if rec.Undo.Own != nil {
		if e := w.entry(ref, false); e != nil {
			return e.tr.Calibrated().Equal(rec.Time)
		}
	}
	return ref.st.since == rec.Undo.Set
}

// before returns the time of the latest record in force before index i;
// zero when there is none.
func (l *calLog) before(i int) time.Time {
	for j := i - 1; j >= 0; j-- {
		if r := &l.recs[j]; !r.damaged && r.Status == CalibrationRecorded {
			return r.Time
		}
	}
	return time.Time{}
}

// putCalibrations queues records of ref's sensor for the commit that
// stores its state. Their values are finite numbers, times and strings,
// and so always encode; a record that did not would be logged and left
// out of the file (the change it records is made all the same).
func (w *worker) putCalibrations(ref *sensorRef, recs ...*storedCalibration) {
	out := store.AlertWrite{Sensor: ref.id, Calibrations: map[uint64][]byte{}}
	for _, r := range recs {
		data, err := json.Marshal(r)
		if err != nil {
			w.s.log.Error().Str("sensor", ref.id).Uint64("calibration", r.Seq).Err(err).Msg("calibration record not stored")
			continue
		}
		out.Calibrations[r.Seq] = data
	}
	ref.st.outs = append(ref.st.outs, out)
}

// recordCalibration adds the record of a calibration just applied.
func (w *worker) recordCalibration(ref *sensorRef, l *calLog, c alert.Calibration, at time.Time, undo calUndo, closed []string) CalibrationRecord {
	rec := storedCalibration{
		CalibrationRecord: CalibrationRecord{
			Sensor: ref.id, Seq: l.next(), Time: c.Time.UTC(), AsFound: c.AsFound, AsLeft: c.AsLeft,
			Recorded: at.UTC(), Status: CalibrationRecorded, Closed: closed,
		},
		Undo: undo,
	}
	w.putCalibrations(ref, &rec)
	l.recs = append(l.recs, rec)
	return rec.CalibrationRecord
}

// amendable returns the sensor's log and the index in it of calibration
// seq if that may be voided or corrected: the one in force, whose effect
// the sensor's state still holds.
func (w *worker) amendable(ref *sensorRef, seq uint64) (*calLog, int, error) {
	if ref.st.sensor == nil {
		return nil, 0, &CalibrationRefError{Sensor: ref.id, Seq: seq, Problem: "none recorded: the service holds no fits of the sensor", Err: ErrNoCalibration}
	}
	l, err := w.calLog(ref)
	if err != nil {
		return nil, 0, err
	}
	i, err := l.inForce(ref.id, seq)
	if err != nil {
		return nil, 0, err
	}
	if rec := &l.recs[i]; !w.holds(ref, rec) {
		return nil, 0, &CalibrationRefError{Sensor: ref.id, Seq: rec.Seq, Err: ErrNotInForce,
			Problem: "the sensor's state no longer holds it (dropped or reset since): record a new calibration instead"}
	}
	return l, i, nil
}

// void withdraws calibration j.amend.void of the sensor: the trackers
// take back the state it replaced (the ticket it closed reopens), and the
// readings cutoff goes back to the one before it, unless another restart
// moved it since. The fits it restarted stay restarted.
func (w *worker) void(j *restartJob, done func(error)) {
	ref, st, a := j.ref, j.ref.st, j.amend
	l, i, err := w.amendable(ref, a.void)
	if err != nil {
		done(err)
		return
	}
	rec := &l.recs[i]
	var reopened []string
	for k, p := range []*alert.Prior{rec.Undo.Own, rec.Undo.Peer} {
		e := (*alertEntry)(nil)
		if p != nil {
			e = w.entry(ref, k == 1)
		}
		if e == nil {
			continue
		}
		d, err := e.tr.Void(a.at, *p, a.reason)
		if err != nil {
			done(err)
			return
		}
		if d.Reopened != nil {
			reopened = append(reopened, d.Reopened.ID)
		}
		w.decided(ref, e, d)
	}
	if st.since == rec.Undo.Set {
		st.since, st.cutMoved = rec.Undo.Cutoff, true
	}
	changed := *rec
	changed.Status, changed.Changed, changed.Reason, changed.Reopened = CalibrationVoided, a.at.UTC(), a.reason, reopened
	w.putCalibrations(ref, &changed)
	*rec = changed
	if j.out != nil {
		*j.out = changed.CalibrationRecord
	}
	w.settled(ref, done)
	w.s.log.Info().Str("sensor", ref.id).Uint64("calibration", rec.Seq).Strs("reopened", reopened).Msg("calibration voided")
}

// correct replaces calibration j.amend.correct of the sensor by j.cal
// (its time kept when zero), recorded under a new number: the trackers
// take its values, the tickets the old one closed are closed by it, and
// the fits restart from its time when that is later than the old one's;
// when it is earlier the readings cutoff moves back to it.
func (w *worker) correct(j *restartJob, done func(error)) {
	ref, st, a := j.ref, j.ref.st, j.amend
	l, i, err := w.amendable(ref, a.correct)
	if err != nil {
		done(err)
		return
	}
	rec := &l.recs[i]
	c := *j.cal
	if c.Time.IsZero() {
		c.Time = rec.Time
	}
	// Every tracker checks this too; checked first, none of them changes
	// when one would refuse.
	floor := l.before(i)
	for _, p := range []*alert.Prior{rec.Undo.Own, rec.Undo.Peer} {
		if p != nil && p.Calibrated.After(floor) {
			floor = p.Calibrated
		}
	}
	if !floor.IsZero() && c.Time.Before(floor) {
		done(fmt.Errorf("t %s is before the calibration in force before it, at %s", c.Time.UTC().Format(time.RFC3339Nano), floor.UTC().Format(time.RFC3339Nano)))
		return
	}
	later := c.Time.After(rec.Time)
	var fresh *rolling.Sensor
	if later {
		if fresh, err = w.freshSensor(ref); err != nil {
			done(err)
			return
		}
	}
	old := alert.Calibration{Time: rec.Time, AsFound: rec.AsFound, AsLeft: rec.AsLeft}
	undo := rec.Undo
	for k, p := range []**alert.Prior{&undo.Own, &undo.Peer} {
		e := (*alertEntry)(nil)
		if *p != nil {
			e = w.entry(ref, k == 1)
		}
		if e == nil {
			continue
		}
		oc, cc := old, c
		if k == 1 {
			oc.AsLeft, cc.AsLeft = 0, 0 // the peer deviation restarts from zero
		}
		d, err := e.tr.Correct(a.at, oc, cc, **p, a.reason)
		if err != nil {
			done(err)
			return
		}
		*p = d.Prior
		w.decided(ref, e, d)
	}
	switch {
	case later:
		w.calibrated(ref)
		w.restartFits(ref, fresh, c.Time.UnixNano())
		undo.Set = c.Time.UnixNano()
	case st.since == rec.Undo.Set:
		st.since, st.cutMoved = c.Time.UnixNano(), true
		undo.Set = st.since
	}
	replaced := *rec
	replaced.Status, replaced.Changed, replaced.Reason, replaced.CorrectedBy = CalibrationCorrected, a.at.UTC(), a.reason, l.next()
	next := storedCalibration{
		CalibrationRecord: CalibrationRecord{
			Sensor: ref.id, Seq: l.next(), Time: c.Time.UTC(), AsFound: c.AsFound, AsLeft: c.AsLeft,
			Recorded: a.at.UTC(), Status: CalibrationRecorded, Corrects: rec.Seq, Closed: rec.Closed,
		},
		Undo: undo,
	}
	w.putCalibrations(ref, &replaced, &next)
	*rec = replaced
	l.recs = append(l.recs, next)
	if j.out != nil {
		*j.out = next.CalibrationRecord
	}
	w.settled(ref, done)
	w.s.log.Info().Str("sensor", ref.id).Uint64("calibration", replaced.Seq).Uint64("by", next.Seq).
		Float64("as_found", c.AsFound).Float64("as_left", c.AsLeft).Time("at", c.Time).Msg("calibration corrected")
}

// settled queues done for the commit that stores the sensor, which is
// to come at once.
func (w *worker) settled(ref *sensorRef, done func(error)) {
	ref.st.acks = append(ref.st.acks, done)
	ref.st.urgent = true
	w.mark(ref)
}
