package ingest

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"time"

	"github.com/nats-io/nats.go"

	"driftfit/alert"
)

// CalibrationMsg is the payload of a calibration on
// <CalibrationSubjectPrefix>.<sensor id>. The reply (to a request) is
// {"ok":true} once the calibration is stored, or {"error":"…"}.
type CalibrationMsg struct {
	// T is when the calibration was done: RFC 3339 or Unix seconds.
	// Empty: when received. A time more than Options.FutureSkew ahead of
	// now is refused.
	T       string  `json:"t"`
	AsFound float64 `json:"as_found"`
	AsLeft  float64 `json:"as_left"`
	// Force records a calibration of a sensor that never reported (no
	// readings, no stored state); without it such a calibration is
	// refused, as the id is most likely mistyped.
	Force bool `json:"force,omitempty"`
}

// ErrUnknownSensor is returned for a calibration of a sensor the service
// has never seen, unless forced.
var ErrUnknownSensor = errors.New("ingest: sensor has never reported")

// controlReq asks the dispatcher to restart a sensor's fits, applying a
// calibration to its alert trackers first when cal is set. done is
// called once: with an error if the request is refused, or with the
// outcome of the commit that stores it.
type controlReq struct {
	id    string
	from  time.Time
	cal   *alert.Calibration
	force bool
	done  func(error)
}

// subscribeCalibrations takes calibrations from the bus into the ordered
// path of the readings. The returned function unsubscribes.
func (s *Service) subscribeCalibrations(stop <-chan struct{}) (func(), error) {
	prefix := s.o.CalibrationSubjectPrefix + "."
	sub, err := s.o.Conn.Subscribe(prefix+">", func(m *nats.Msg) {
		id := strings.TrimPrefix(m.Subject, prefix)
		reply := func(err error) {
			if err != nil {
				s.log.Warn().Str("sensor", id).Err(err).Msg("calibration refused")
			}
			s.reply(m, err)
		}
		c, err := s.parseCalibration(id, m.Data)
		if err != nil {
			reply(err)
			return
		}
		req := controlReq{id: id, from: c.Time, cal: &c.Calibration, force: c.force, done: reply}
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

type parsedCalibration struct {
	alert.Calibration
	force bool
}

func (s *Service) parseCalibration(id string, data []byte) (parsedCalibration, error) {
	if id == "" {
		return parsedCalibration{}, errors.New("subject has no sensor id")
	}
	var c CalibrationMsg
	if err := json.Unmarshal(data, &c); err != nil {
		return parsedCalibration{}, fmt.Errorf("payload: %w", err)
	}
	at := s.o.Now()
	if c.T != "" {
		ns, err := ParseTime([]byte(c.T))
		if err != nil {
			return parsedCalibration{}, fmt.Errorf("t %q: %w", c.T, err)
		}
		at = time.Unix(0, ns)
	}
	if limit := s.o.Now().Add(s.o.FutureSkew); at.After(limit) {
		return parsedCalibration{}, fmt.Errorf("t %s is more than %v ahead of now: refused, as it would refuse every reading until then",
			at.UTC().Format(time.RFC3339), s.o.FutureSkew)
	}
	return parsedCalibration{alert.Calibration{Time: at, AsFound: c.AsFound, AsLeft: c.AsLeft}, c.Force}, nil
}

// reply answers a request, unless its reply subject lies under one of
// the service's own subjects: answering there would let a client publish
// where its permissions may not allow it.
func (s *Service) reply(m *nats.Msg, err error) {
	if m.Reply == "" {
		return
	}
	for _, p := range s.ownPrefixes() {
		if m.Reply == p || strings.HasPrefix(m.Reply, p+".") {
			s.badLog.Warn().Str("subject", m.Subject).Str("reply", m.Reply).Msg("reply onto the service's own subjects refused")
			return
		}
	}
	ans := []byte(`{"ok":true}`)
	if err != nil {
		ans, _ = json.Marshal(map[string]string{"error": err.Error()})
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
	return s.request(ctx, controlReq{id: id, from: c.Time, cal: &c, force: force})
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
	s.workers[ref.worker].in <- &workBatch{restart: &restartJob{ref: ref, from: req.from.UnixNano(), cal: req.cal, done: req.done}}
	s.dirty, s.urgent = true, true
}
