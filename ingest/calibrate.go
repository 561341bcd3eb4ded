package ingest

import (
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"strings"
	"time"
	"unicode"
	"unicode/utf8"

	"github.com/nats-io/nats.go"

	"driftfit/alert"
)

// CalibrationMsg is the payload of a calibration request on
// <CalibrationSubjectPrefix>.<sensor id>: a calibration to record, or,
// with Void or Correct set, a void or correction of one recorded. The
// reply (to a request) is a CalibrationReply, sent once the change is
// stored.
type CalibrationMsg struct {
	// T is when the calibration was done: RFC 3339 or Unix seconds.
	// Empty: when received (for a correction: the time recorded). A time
	// more than Options.FutureSkew ahead of now is refused.
	T string `json:"t"`
	// AsFound and AsLeft, in the sensor's unit, are required to record
	// or correct a calibration.
	AsFound float64 `json:"as_found"`
	AsLeft  float64 `json:"as_left"`
	// Force records a calibration of a sensor that never reported (no
	// readings, no stored state); without it such a calibration is
	// refused, as the id is most likely mistyped.
	Force bool `json:"force,omitempty"`
	// Void, when not 0, withdraws the sensor's calibration of that
	// number (CalibrationRecord.Seq), which must be its latest in force;
	// t, as_found, as_left and force must then be absent (or zero).
	Void uint64 `json:"void,omitempty"`
	// Correct, when not 0, replaces the sensor's calibration of that
	// number, which must be its latest in force, by AsFound, AsLeft and
	// T; the correction is recorded under a number of its own.
	Correct uint64 `json:"correct,omitempty"`
	// Reason says why a calibration is voided or corrected, at most
	// MaxReason bytes of printable text; stored with the record.
	Reason string `json:"reason,omitempty"`
}

// CalibrationReply answers a calibration request: OK once the change is
// stored, with the record (the calibration recorded, the correction, or
// the calibration voided, as stored), else Error.
type CalibrationReply struct {
	OK     bool               `json:"ok"`
	Error  string             `json:"error,omitempty"`
	Record *CalibrationRecord `json:"record,omitempty"`
}

// ErrUnknownSensor is returned for a calibration of a sensor the service
// has never seen, unless forced.
var ErrUnknownSensor = errors.New("ingest: sensor has never reported")

// controlReq asks the dispatcher to restart a sensor's fits, applying a
// calibration to its alert trackers first when cal is set, or to void or
// correct a calibration (amend). done is called once: with an error if
// the request is refused, or with the outcome of the commit that stores
// it; out, if set, receives the calibration record first.
type controlReq struct {
	id    string
	from  time.Time
	cal   *alert.Calibration
	amend *amendment
	at    time.Time
	force bool
	out   *CalibrationRecord
	done  func(error)
}

// subscribeCalibrations takes calibrations from the bus into the ordered
// path of the readings. The returned function unsubscribes.
func (s *Service) subscribeCalibrations(stop <-chan struct{}) (func(), error) {
	prefix := s.o.CalibrationSubjectPrefix + "."
	sub, err := s.o.Conn.Subscribe(prefix+">", func(m *nats.Msg) {
		id := strings.TrimPrefix(m.Subject, prefix)
		var rec CalibrationRecord
		reply := func(err error) {
			if err != nil {
				s.log.Warn().Str("sensor", id).Err(err).Msg("calibration refused")
				s.reply(m, err, nil)
				return
			}
			s.reply(m, nil, &rec)
		}
		req, err := s.parseCalibration(id, m.Data)
		if err != nil {
			reply(err)
			return
		}
		req.out, req.done = &rec, reply
		select {
		case s.control <- req:
		case <-stop:
			reply(errors.New("service stopping"))
		}
	})
	if err != nil {
		return nil, fmt.Errorf("ingest: subscribe %s>: %w", prefix, err)
	}
	return func() { _ = sub.Unsubscribe() }, nil
}

// parseCalibration reads a CalibrationMsg into a request, refusing with
// the field and its value what cannot be applied.
func (s *Service) parseCalibration(id string, data []byte) (controlReq, error) {
	if id == "" {
		return controlReq{}, errors.New("subject has no sensor id")
	}
	var c CalibrationMsg
	if err := json.Unmarshal(data, &c); err != nil {
		return controlReq{}, fmt.Errorf("payload: %w", err)
	}
	var given map[string]json.RawMessage // which fields the payload holds
	_ = json.Unmarshal(data, &given)
	now := s.o.Now()
	req := controlReq{id: id, at: now, force: c.Force}
	if err := checkReason(c.Reason); err != nil {
		return req, err
	}
	switch {
	case c.Void != 0 && c.Correct != 0:
		return req, fmt.Errorf("void %d and correct %d: give one", c.Void, c.Correct)
	case c.Void != 0:
		// Zero values count as absent: a client built on this type sends
		// every field.
		for _, f := range []struct {
			name string
			set  bool
		}{{"t", c.T != ""}, {"as_found", c.AsFound != 0}, {"as_left", c.AsLeft != 0}, {"force", c.Force}} {
			if f.set {
				return req, fmt.Errorf("%s %s: not taken with void (a void names the calibration only)", f.name, given[f.name])
			}
		}
		req.amend = &amendment{void: c.Void, reason: c.Reason, at: now}
		return req, nil
	case c.Correct != 0:
		req.amend = &amendment{correct: c.Correct, reason: c.Reason, at: now}
		if c.Force {
			return req, fmt.Errorf("force %s: not taken with correct", given["force"])
		}
	case c.Reason != "":
		return req, fmt.Errorf("reason %q: taken only with void or correct", c.Reason)
	}
	for _, f := range []string{"as_found", "as_left"} {
		if _, ok := given[f]; !ok {
			return req, fmt.Errorf("%s: missing (the value in the sensor's unit)", f)
		}
	}
	if !finite(c.AsFound) || !finite(c.AsLeft) {
		return req, fmt.Errorf("as_found %v, as_left %v: must be finite", c.AsFound, c.AsLeft)
	}
	var at time.Time // zero: a correction keeps its time
	if req.amend == nil {
		at = now
	}
	if c.T != "" {
		ns, err := ParseTime([]byte(c.T))
		if err != nil {
			return req, fmt.Errorf("t %q: %w", c.T, err)
		}
		at = time.Unix(0, ns)
	}
	if limit := now.Add(s.o.FutureSkew); at.After(limit) {
		return req, fmt.Errorf("t %s is more than %v ahead of now: refused, as it would refuse every reading until then",
			at.UTC().Format(time.RFC3339), s.o.FutureSkew)
	}
	req.cal, req.from = &alert.Calibration{Time: at, AsFound: c.AsFound, AsLeft: c.AsLeft}, at
	return req, nil
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// checkReason refuses a reason too long or holding characters that are
// not printable: it is stored and shown in listings.
func checkReason(r string) error {
	if len(r) > MaxReason {
		return fmt.Errorf("reason: %d bytes, longer than %d", len(r), MaxReason)
	}
	if !utf8.ValidString(r) {
		return fmt.Errorf("reason %q: not valid UTF-8", r)
	}
	for i, c := range r {
		if !unicode.IsPrint(c) {
			return fmt.Errorf("reason %q: character %U at byte %d is not printable", r, c, i)
		}
	}
	return nil
}

// reply answers a request, unless its reply subject lies under one of
// the service's own subjects: answering there would let a client publish
// where its permissions may not allow it.
func (s *Service) reply(m *nats.Msg, err error, rec *CalibrationRecord) {
	if m.Reply == "" {
		return
	}
	for _, p := range s.ownPrefixes() {
		if m.Reply == p || strings.HasPrefix(m.Reply, p+".") {
			s.badLog.Warn().Str("subject", m.Subject).Str("reply", m.Reply).Msg("reply onto the service's own subjects refused")
			return
		}
	}
	ans, merr := json.Marshal(CalibrationReply{OK: true, Record: rec})
	if err != nil || merr != nil {
		// The reader of a reply is a person or another program, not this
		// package: its name adds nothing to the reason.
		ans, _ = json.Marshal(CalibrationReply{Error: strings.TrimPrefix(cmp.Or(err, merr).Error(), "ingest: ")})
	}
	if perr := s.o.Conn.Publish(m.Reply, ans); perr != nil {
		s.badLog.Warn().Err(perr).Str("subject", m.Reply).Msg("reply not sent")
	}
}

// Subjects lists the subject prefixes the service reads or writes
// (readings, calibrations, alerts, tickets): no reply it sends goes
// under them.
func (s *Service) Subjects() []string { return s.ownPrefixes() }

// ownPrefixes lists the subjects the service reads or writes.
func (s *Service) ownPrefixes() []string {
	return []string{s.o.SubjectPrefix, s.o.CalibrationSubjectPrefix, strings.TrimSuffix(s.alertPrefix, "."), s.o.TicketSubject}
}

// Restart starts a sensor's fits afresh from the time from, as after a
// calibration: the sensor's windows are emptied, its stored panes are
// deleted with the next commit (its fit history is kept), and readings
// older than from are refused from then on (as too old), also after the
// service restarts: the time is stored with the next commit. Readings
// received before the call are applied first. It is safe for concurrent
// use and returns once the commit that stores it is done, or ctx is
// done.
func (s *Service) Restart(ctx context.Context, id string, from time.Time) error {
	return s.request(ctx, controlReq{id: id, from: from, force: true})
}

// Calibrate records a calibration of sensor id, as one arriving on the
// bus does: its open ticket closes, its alerts reset, its fits restart
// from c.Time. It returns once the commit that stores it is done.
func (s *Service) Calibrate(ctx context.Context, id string, c alert.Calibration, force bool) error {
	return s.request(ctx, controlReq{id: id, from: c.Time, cal: &c, at: s.o.Now(), force: force})
}

// VoidCalibration withdraws calibration seq of sensor id, which must be
// its latest in force, as a void arriving on the bus does, and returns
// the voided record once the commit that stores it is done. Errors: a
// *CalibrationRefError when seq is not that calibration.
func (s *Service) VoidCalibration(ctx context.Context, id string, seq uint64, reason string) (CalibrationRecord, error) {
	var rec CalibrationRecord
	if err := checkReason(reason); err != nil {
		return rec, err
	}
	now := s.o.Now()
	err := s.request(ctx, controlReq{id: id, amend: &amendment{void: seq, reason: reason, at: now}, at: now, out: &rec})
	return rec, err
}

// CorrectCalibration replaces calibration seq of sensor id, which must
// be its latest in force, by c (c.Time zero: the time recorded), as a
// correction arriving on the bus does, and returns the correction's
// record once the commit that stores it is done.
func (s *Service) CorrectCalibration(ctx context.Context, id string, seq uint64, c alert.Calibration, reason string) (CalibrationRecord, error) {
	var rec CalibrationRecord
	if err := checkReason(reason); err != nil {
		return rec, err
	}
	if seq == 0 {
		return rec, &CalibrationRefError{Sensor: id, Problem: "none recorded: calibrations are numbered from 1", Err: ErrNoCalibration}
	}
	if !finite(c.AsFound) || !finite(c.AsLeft) {
		return rec, fmt.Errorf("as_found %v, as_left %v: must be finite", c.AsFound, c.AsLeft)
	}
	now := s.o.Now()
	if limit := now.Add(s.o.FutureSkew); c.Time.After(limit) {
		return rec, fmt.Errorf("t %s is more than %v ahead of now", c.Time.UTC().Format(time.RFC3339), s.o.FutureSkew)
	}
	err := s.request(ctx, controlReq{id: id, cal: &c, from: c.Time, amend: &amendment{correct: seq, reason: reason, at: now}, at: now, out: &rec})
	return rec, err
}

func (s *Service) request(ctx context.Context, req controlReq) error {
	res := make(chan error, 1)
	req.done = func(err error) { res <- err }
	select {
	case s.control <- req:
	case <-ctx.Done():
		return ctx.Err()
	}
	select {
	case err := <-res:
		return err
	case <-ctx.Done():
		return ctx.Err()
	}
}

// control routes a restart or calibration behind everything already
// routed to the sensor's worker. Called by the dispatcher.
func (s *Service) controlled(req controlReq) {
	ref := s.refs[req.id]
	if ref == nil && req.amend != nil {
		seq := max(req.amend.void, req.amend.correct)
		req.done(&CalibrationRefError{Sensor: req.id, Seq: seq, Problem: "none recorded: the service holds no state of the sensor", Err: ErrNoCalibration})
		return
	}
	if ref == nil && !req.force {
		req.done(fmt.Errorf("%w: %q (add \"force\": true to record it anyway)", ErrUnknownSensor, req.id))
		return
	}
	ref, err := s.ref(req.id)
	if err != nil {
		req.done(fmt.Errorf("ingest: restart: %w", err))
		return
	}
	ref.made.Store(true) // the restart makes its sensor: never swept
	s.flushWorker(ref.worker)
	s.workers[ref.worker].in <- &workBatch{restart: &restartJob{ref: ref, from: req.from.UnixNano(), cal: req.cal, amend: req.amend, at: req.at, out: req.out, done: req.done}}
	s.dirty, s.urgent = true, true
}
