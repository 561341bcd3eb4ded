package ingest

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"hash/maphash"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"driftfit/rolling"
	"driftfit/store"
)

// Dead-letter headers: why a message was refused.
const (
	HeaderReason   = "Driftfit-Reason"   // reason label of the (first) problem
	HeaderError    = "Driftfit-Error"    // its error text
	HeaderSubject  = "Driftfit-Subject"  // the subject the input arrived on
	HeaderRejected = "Driftfit-Rejected" // per-reading problems of a batch: "index:reason,..."
)

// Sizes of the internal queues, chosen so a burst of 100-reading batches
// keeps every worker busy; a worker holds at most workQueueLen ×
// jobsPerBatch payloads in flight (about 50 MB of 3 KB batches).
const (
	inboxLen     = 4096 // messages between the bus callback and the dispatcher
	drainMax     = 1024 // messages the dispatcher takes before flushing to workers
	jobsPerBatch = 256  // jobs in one hand-off to a worker
	workQueueLen = 64   // hand-offs queued per worker
	// maxAckPending is the consumer's limit of messages delivered and
	// not acknowledged; acknowledgements follow commits, and a commit
	// starts early once half of it is taken (see Run). A limit of 2^18
	// made the crash test (ten restarts under load) take 98 s instead of
	// 55 s; not profiled.
	maxAckPending = 1 << 16
)

// message is one bus message, either mode.
type message struct {
	subject string
	data    []byte
	seq     uint64        // stream sequence; 0 in direct mode
	pending uint64        // messages left in the stream after this one
	js      jetstream.Msg // for the acknowledgement; nil in direct mode
	gen     uint64        // the consumer that delivered it (streamSource.gen)
}

// sensorRef routes one sensor. The dispatcher owns the map of refs; id,
// worker and unit never change once made; st belongs to the worker alone.
// made and inflight let the dispatcher forget the route of an id that
// never produced a reading (see sweep) without reading st.
type sensorRef struct {
	id     string
	worker int
	unit   string
	group  string // peer group; "" for none
	st     *sensorState
	// made is set by the worker once st.sensor exists; never cleared.
	made atomic.Bool
	// inflight counts the jobs routed to the worker while made was
	// unset and not yet applied: the dispatcher adds, the worker
	// subtracts.
	inflight atomic.Int32
}

type sensorState struct {
	// sensor is made by the worker from windows with the first reading
	// it accepts; nil until then.
	sensor  *rolling.Sensor
	windows []rolling.WindowSpec
	touched bool // listed in the worker's touched since its last snapshot
	// since refuses readings older than the sensor's last restart (a
	// calibration), Unix ns; 0: none. It is stored, so it holds across
	// restarts of the service. dropped asks the next commit to delete the
	// stored panes of before the restart and store since.
	since   int64
	dropped bool
	// cutMoved asks the next commit to store since alone (a voided or
	// corrected calibration moved it without restarting the fits).
	cutMoved bool

	alerts alertState
	member *peerMember // nil: not (yet) in a peer group
	joined bool        // the worker looked at the sensor's group

	// Stream sequences (0 in direct mode): savedSeq of the last message
	// the stored state holds, lastSeq of the last one folded in, firstSeq
	// of the first one folded in since the last snapshot (0: none).
	// unsaved counts the readings applied since the last snapshot.
	savedSeq, lastSeq, firstSeq uint64
	unsaved                     uint64
	// Decisions and calibration answers waiting for the commit that
	// stores the sensor: they go into the same transaction as its state.
	outs   []store.AlertWrite
	acks   []func(error)
	urgent bool // snapshot at the next commit token, whatever the budget
	// dedup refuses readings already applied.
	dedup Dedup
}

// Service reads readings from NATS into per-sensor fits and commits them
// to the DB. Create it with New, run it with Run.
type Service struct {
	o      Options
	log    zerolog.Logger
	badLog zerolog.Logger // rate-limited, for refused input
	capLog zerolog.Logger // rate-limited, for the sensor limit

	refs    map[string]*sensorRef // dispatcher only
	sweepAt int                   // routes without a sensor that start a sweep
	workers []*worker
	seed    maphash.Seed
	prefix  string // SubjectPrefix + "."

	// dispatcher state
	pending    []*workBatch // per worker, being filled
	lastMsg    jetstream.Msg
	lastSeq    uint64
	marks      []ackMark // sampled since the last commit
	budget     int       // sensors a worker snapshots at a token, besides urgent ones
	commitBase uint64    // applied at the last commit
	sinceAck   int       // stream messages taken since the last commit
	dirty      bool
	// src is the stream source (nil in direct mode); minGen the oldest
	// consumer whose messages are taken; refetching is set from asking
	// for a gap to be read again until the next message is taken.
	src        *streamSource
	minGen     uint64
	refetching bool
	// appliedSeq is lastSeq for other goroutines.
	appliedSeq atomic.Uint64
	// purges holds the last committed position to purge (purgeTo).
	purges chan purgeReq
	// streamBytes counts the subject and payload bytes of the stream
	// messages taken (dispatcher), about what the stream stores of them.
	streamBytes uint64

	commits chan commitReq
	control chan controlReq
	fatal   chan error

	// Alert side. savedAlerts holds the stored alert states, read-only
	// once restored (workers make trackers from them on first use).
	savedAlerts map[string][]byte
	tickets     *ticketIndex // open tickets, for the metrics
	alertPrefix string       // AlertSubjectPrefix + "."
	outbox      *outbox
	urgent      bool          // dispatcher: commit as soon as the committer is free
	wakeCommit  chan struct{} // workers: a decision waits to be committed
	freed       chan struct{} // committer: a commit is done

	dq serviceQuality // restored peer deviation sensors (detect.go)

	// appliedBase is the applied count of the restored state; the
	// workers count from zero on top of it.
	appliedBase uint64

	// backlog says the last commit left changed sensors for the next.
	backlog atomic.Bool

	messages, applied, rejected atomic.Uint64
	position                    atomic.Uint64
	sensors, routes             atomic.Int64
}

// New checks the options and returns a service ready to Run.
func New(o Options) (*Service, error) {
	if err := o.fill(); err != nil {
		return nil, err
	}
	s := &Service{
		o:       o,
		log:     o.Logger.With().Str("component", "ingest").Logger(),
		refs:    map[string]*sensorRef{},
		seed:    maphash.MakeSeed(),
		prefix:  o.SubjectPrefix + ".",
		commits: make(chan commitReq, 1),
		control: make(chan controlReq),
		fatal:   make(chan error, 1),

		savedAlerts: map[string][]byte{},
		tickets:     newTicketIndex(),
		alertPrefix: o.AlertSubjectPrefix + ".",
		wakeCommit:  make(chan struct{}, 1),
		freed:       make(chan struct{}, 1),
		sweepAt:     sweepMin,
		purges:      make(chan purgeReq, 1),
	}
	s.outbox = newOutbox(s)
	if o.Metrics != nil && o.Metrics.tickets != nil {
		o.Metrics.tickets.src.Store(&ticketSource{idx: s.tickets, now: o.Now})
	}
	s.budget = max(1, o.CommitMaxSensors/o.Workers)
	s.badLog = s.log.Sample(&zerolog.BurstSampler{Burst: 10, Period: 10 * time.Second})
	s.capLog = s.log.Sample(&zerolog.BurstSampler{Burst: 1, Period: time.Minute})
	for i := range o.Workers {
		s.workers = append(s.workers, newWorker(s, i))
	}
	s.pending = make([]*workBatch, o.Workers)
	return s, nil
}

// Stats returns the running totals. It is safe to call from any goroutine.
func (s *Service) Stats() Stats {
	return Stats{
		Messages: s.messages.Load(),
		Applied:  s.applied.Load(),
		Rejected: s.rejected.Load(),
		Sensors:  int(s.sensors.Load()),
		Routes:   int(s.routes.Load()),
		Position: s.position.Load(),
		Backlog:  s.backlog.Load(),
	}
}

// Run restores the sensors from the DB, reads the bus until ctx is done,
// then stops taking messages, applies what it received, commits, and
// returns nil. It returns an error if it cannot start or if a commit
// fails; the file then still holds the last good commit, and a restart
// resumes from it.
func (s *Service) Run(ctx context.Context) error {
	if err := s.restore(); err != nil {
		return err
	}
	if err := s.outbox.loadLeft(); err != nil {
		return err
	}
	var wg sync.WaitGroup
	for _, w := range s.workers {
		wg.Add(1)
		go func() { defer wg.Done(); w.run() }()
	}
	committerDone := make(chan struct{})
	go func() { defer close(committerDone); s.committer() }()
	// The outbox senders outlive ingest: they send what the last commit
	// stored (bounded by StopTimeout).
	sendCtx, stopSend := context.WithCancel(context.WithoutCancel(ctx))
	var senders sync.WaitGroup
	senders.Add(2)
	go func() { defer senders.Done(); s.outbox.runBus(sendCtx) }()
	go func() { defer senders.Done(); s.outbox.runWebhook(sendCtx) }()
	stopAll := func() {
		stopSend()
		senders.Wait()
		close(s.commits)
		<-committerDone
		for _, w := range s.workers {
			close(w.in)
		}
		wg.Wait()
	}
	stopping := make(chan struct{})
	stopCal, err := s.subscribeCalibrations(stopping)
	if err != nil {
		close(stopping)
		stopAll()
		return err
	}

	in := make(chan message, inboxLen)
	src, err := s.start(ctx, in)
	if err != nil {
		stopCal()
		close(stopping)
		stopAll()
		if ctx.Err() != nil {
			return nil // stopped while starting: nothing taken, nothing to commit
		}
		return err
	}
	s.log.Info().Str("mode", s.o.Mode.String()).Str("subject", s.prefix+">").Int("workers", len(s.workers)).Int("sensors", len(s.refs)).Msg("ingest started")

	tick := time.NewTicker(s.o.CommitInterval)
	defer tick.Stop()
	var runErr error
loop:
	for {
		select {
		case m := <-in:
			s.handle(m)
			s.drain(in, drainMax-1)
			early := s.applied.Load()-s.commitBase >= uint64(s.o.CommitReadings) || s.sinceAck >= maxAckPending/2
			if early && s.committerFree() {
				s.commit()
			}
		case <-tick.C:
			s.sweepIdle()
			if (s.dirty || s.backlog.Load() || s.outbox.pendingDone()) && s.committerFree() {
				s.commit()
			}
		case <-s.wakeCommit:
			s.urgent = true
		case <-s.freed:
			// Sensors left out by the budget go in the next commit at
			// once, so the stored position keeps up.
			if s.backlog.Load() && s.committerFree() {
				s.commit()
			}
		case req := <-s.control:
			s.controlled(req)
		case runErr = <-s.fatal:
			break loop
		case <-ctx.Done():
			break loop
		}
		// A decision (an alert, a ticket, a calibration) is committed as
		// soon as the committer is free, so it goes out without waiting
		// for the interval.
		if s.urgent && s.committerFree() {
			s.commitCut(false, true) // the rest follows as backlog
		}
	}

	// Stop taking calibrations and messages, apply what was received,
	// commit, send what it stored, delete what was sent, stop.
	stopCal()
	close(stopping)
	stopped := make(chan struct{})
	go func() { defer close(stopped); src.stop() }()
	for waiting := true; waiting; {
		select {
		case m := <-in:
			s.handle(m)
			s.drain(in, drainMax-1)
		case <-stopped:
			waiting = false
		}
	}
	s.drain(in, len(in))
	for drained := false; !drained; {
		select {
		case req := <-s.control:
			req.done(errors.New("ingest: service stopping"))
		default:
			drained = true
		}
	}
	if runErr == nil {
		<-s.commitCut(true, false).finished
		if s.outbox.flushed(s.o.StopTimeout) && s.outbox.pendingDone() {
			<-s.commitCut(true, false).finished
		}
	}
	stopAll()
	select {
	case err := <-s.fatal:
		runErr = errors.Join(runErr, err)
	default:
	}
	st := s.Stats()
	s.log.Info().Uint64("messages", st.Messages).Uint64("applied", st.Applied).Uint64("rejected", st.Rejected).
		Int("sensors", st.Sensors).Uint64("position", st.Position).Msg("ingest stopped")
	return runErr
}

// drain handles up to max more messages already queued, then hands the
// filled batches to the workers.
func (s *Service) drain(in chan message, max int) {
	for range max {
		select {
		case m := <-in:
			s.handle(m)
			continue
		default:
		}
		break
	}
	s.flush()
}

// restore rebuilds the stored sensors and hands them to their workers.
func (s *Service) restore() error {
	cfgs := map[string]SensorConfig{}
	var mu sync.Mutex // Restore makes sensors on several goroutines
	t0 := time.Now()
	var dropped int
	err := s.o.DB.Restore(func(id string) (*rolling.Sensor, error) {
		cfg, err := s.o.Sensor(restoredID(id))
		if err != nil {
			s.log.Warn().Str("sensor", id).Err(err).Msg("stored sensor has no configuration; left out")
			return nil, nil
		}
		mu.Lock()
		cfgs[id] = cfg
		mu.Unlock()
		return rolling.NewSensor(cfg.Windows...)
	}, func(r store.Restored) error {
		if s.keepPeerSensor(r) {
			return nil
		}
		if r.Changed {
			s.log.Info().Str("sensor", r.ID).Msg("windows changed since the state was saved; panes of kept widths carried over")
		}
		dropped += r.Dropped
		if r.SetAside != nil {
			s.log.Error().Str("sensor", r.ID).Err(r.SetAside).Msg("stored state set aside: the sensor starts afresh")
			if m := s.o.Metrics; m != nil {
				m.SetAside.Inc()
			}
		}
		st := s.addRef(r.ID, cfgs[r.ID], r.Sensor).st
		st.since, st.savedSeq, st.lastSeq = r.Restart, r.Seq, r.Seq
		return nil
	})
	if err != nil {
		return fmt.Errorf("ingest: restore: %w", err)
	}
	pos, err := s.o.DB.Position()
	if err != nil {
		return err
	}
	s.position.Store(pos)
	s.lastSeq = pos
	if s.appliedBase, err = s.o.DB.Applied(); err != nil {
		return err
	}
	if err := s.o.DB.AlertStates(func(id string, st []byte) error {
		s.savedAlerts[id] = bytes.Clone(st)
		return nil
	}); err != nil {
		return fmt.Errorf("ingest: restore alert states: %w", err)
	}
	if err := s.o.DB.Tickets(func(id string, data []byte) error {
		if err := s.tickets.load(data); err != nil {
			s.log.Warn().Str("ticket", id).Err(err).Msg("stored ticket unreadable; not counted in the metrics")
		}
		return nil
	}); err != nil {
		return fmt.Errorf("ingest: restore tickets: %w", err)
	}
	s.log.Info().Int("sensors", len(s.refs)).Int("dropped_panes", dropped).Uint64("position", pos).
		Dur("took", time.Since(t0)).Msg("state restored")
	return nil
}

// addRef routes sensor id to its worker, with its state restored
// (sensor) or to be made with its first reading (from cfg.Windows). The
// members of a peer group share the group's worker.
func (s *Service) addRef(id string, cfg SensorConfig, sensor *rolling.Sensor) *sensorRef {
	route := id
	if cfg.Group != "" {
		route = "\x00group\x00" + cfg.Group
	}
	ref := &sensorRef{
		id:     id,
		worker: int(maphash.String(s.seed, route) % uint64(len(s.workers))),
		unit:   cfg.Unit,
		group:  cfg.Group,
		st:     &sensorState{sensor: sensor, windows: cfg.Windows},
	}
	s.refs[id] = ref
	s.routes.Store(int64(len(s.refs)))
	if sensor != nil {
		ref.st.dedup.Restored(sensor)
		s.sensorMade(ref)
	}
	return ref
}

// sensorMade counts one more sensor held; safe from any goroutine.
func (s *Service) sensorMade(ref *sensorRef) {
	ref.made.Store(true)
	s.sensorsChanged(s.sensors.Add(1))
}

// admitSensor counts one more sensor held, unless Options.MaxSensors are
// held already; safe from any goroutine. The dispatcher refuses new ids
// at the limit too, but several new ids may be in flight to the workers
// at once: this is where the limit is exact.
func (s *Service) admitSensor(ref *sensorRef) error {
	for {
		n := s.sensors.Load()
		if n >= int64(s.o.MaxSensors) {
			s.capLog.Warn().Int("max_sensors", s.o.MaxSensors).Str("sensor", QuoteID(ref.id)).Msg("sensor limit reached: new sensor ids refused")
			return &tooManySensorsError{id: ref.id, max: s.o.MaxSensors}
		}
		if s.sensors.CompareAndSwap(n, n+1) {
			ref.made.Store(true)
			s.sensorsChanged(n + 1)
			return nil
		}
	}
}

func (s *Service) sensorsChanged(n int64) {
	if m := s.o.Metrics; m != nil {
		m.Sensors.Set(float64(n))
	}
}

// sweepMin is the count of routes without a sensor that starts a sweep;
// each sweep at least doubles it for the next, so sweeping costs O(1) a
// new id however the ids come.
const sweepMin = 4096

// ref returns the route of sensor id, adding one for a configured sensor
// seen for the first time. It refuses an id that fails CheckSensorID
// (*SensorIDError), one with no configuration, and a new id while
// Options.MaxSensors sensors are held (ErrTooManySensors). Routes of
// new ids whose readings are still in flight do not count against the
// limit: a flood of bad payloads under new ids then never turns a good
// new sensor away.
func (s *Service) ref(id string) (*sensorRef, error) {
	if ref := s.refs[id]; ref != nil {
		return ref, nil
	}
	if err := CheckSensorID(id); err != nil {
		return nil, err
	}
	if len(s.refs)-int(s.sensors.Load()) >= s.sweepAt {
		s.sweep()
	}
	if s.sensors.Load() >= int64(s.o.MaxSensors) {
		s.capLog.Warn().Int("max_sensors", s.o.MaxSensors).Str("sensor", QuoteID(id)).Msg("sensor limit reached: new sensor ids refused")
		return nil, &tooManySensorsError{id: id, max: s.o.MaxSensors}
	}
	cfg, err := s.o.Sensor(id)
	if err != nil {
		return nil, fmt.Errorf("sensor %s: %w", QuoteID(id), err)
	}
	return s.addRef(strings.Clone(id), cfg, nil), nil
}

// sweep forgets the routes of ids whose readings never made a sensor (all
// refused, say) and that have no job in flight: a flood of distinct ids
// with bad payloads then holds no memory. A route with a job in flight
// stays, so one id never has two states. Dispatcher only.
func (s *Service) sweep() {
	for id, ref := range s.refs {
		if !ref.made.Load() && ref.inflight.Load() == 0 {
			delete(s.refs, id)
		}
	}
	s.sweepAt = max(sweepMin, 2*(len(s.refs)-int(s.sensors.Load())))
	s.routes.Store(int64(len(s.refs)))
}

// sweepIdle sweeps, from the commit ticker, when routes without a sensor
// are held, so none outlives its last message by more than a tick or so.
func (s *Service) sweepIdle() {
	if len(s.refs) > int(s.sensors.Load()) {
		s.sweep()
	}
}

// tooManySensorsError refuses a new sensor id beyond Options.MaxSensors.
type tooManySensorsError struct {
	id  string
	max int
}

func (e *tooManySensorsError) Error() string {
	return fmt.Sprintf("ingest: sensor %s not taken: %d sensors held, the limit (max_sensors)", QuoteID(e.id), e.max)
}

func (e *tooManySensorsError) Unwrap() error { return ErrTooManySensors }

// reasonForRoute classifies an error of ref.
func reasonForRoute(err error) Reason {
	switch {
	case errors.Is(err, ErrSensorID):
		return ReasonBadSensorID
	case errors.Is(err, ErrTooManySensors):
		return ReasonTooManySensors
	}
	return ReasonMalformed
}

// source is a running subscription.
type source struct{ stop func() }

// start subscribes to the bus, feeding in.
func (s *Service) start(ctx context.Context, in chan message) (*source, error) {
	quit := make(chan struct{})
	push := func(m message) {
		select {
		case in <- m:
		case <-quit:
		}
	}
	if s.o.Mode == ModeDirect {
		sub, err := s.o.Conn.Subscribe(s.prefix+">", func(m *nats.Msg) {
			push(message{subject: m.Subject, data: m.Data})
		})
		if err != nil {
			return nil, fmt.Errorf("ingest: subscribe %s>: %w", s.prefix, err)
		}
		// Hold up to a million messages or 256 MiB in the client before
		// it reports a slow consumer and drops: bursts wait, floods are
		// counted (Metrics.SlowConsumer, set by the connection's handler).
		if err := sub.SetPendingLimits(1<<20, 256<<20); err != nil {
			return nil, err
		}
		if err := s.o.Conn.Flush(); err != nil {
			return nil, err
		}
		return &source{stop: func() {
			closed := sub.StatusChanged(nats.SubscriptionClosed)
			if err := sub.Drain(); err == nil {
				select {
				case <-closed:
				case <-time.After(s.o.StopTimeout):
					s.log.Warn().Dur("waited", s.o.StopTimeout).Msg("subscription not drained in time")
				}
			}
			close(quit)
		}}, nil
	}

	src, err := s.startStream(ctx, in)
	if err != nil {
		return nil, err
	}
	s.src = src
	return &source{stop: src.stop}, nil
}

// handle routes one message to the worker of its sensor, which decodes
// and validates it: decoding is most of the work per reading, and the
// workers share it out over the cores.
func (s *Service) handle(m message) {
	if m.seq != 0 {
		if m.gen < s.minGen || m.seq <= s.lastSeq {
			return // from a consumer since replaced, or a redelivery of a message applied
		}
		if m.seq != s.lastSeq+1 {
			// The consumer sees every sequence of the stream (its filter
			// is all of the stream's subjects), so a message skipped is
			// one lost in flight: after a reconnect, the client drops
			// what the server sent while it was away, and the next
			// acknowledgement (ack-all) would acknowledge it. Read again
			// from the last applied message, once; if the stream itself
			// no longer holds the messages, count them lost.
			missing := m.seq - s.lastSeq - 1
			if !s.refetching {
				s.refetching = true
				s.minGen = s.src.gen.Load() + 1
				s.src.resume(s.lastSeq + 1)
				if mt := s.o.Metrics; mt != nil {
					mt.StreamRefetch.Inc()
				}
				s.log.Warn().Uint64("position", s.lastSeq).Uint64("next", m.seq).Uint64("messages", missing).Msg("stream gap: reading again from the last applied message")
				return
			}
			s.lost(missing, s.lastSeq)
		}
		s.refetching = false
		s.lastSeq, s.lastMsg = m.seq, m.js
		s.appliedSeq.Store(m.seq)
		if m.seq%ackEvery == 0 {
			s.marks = append(s.marks, ackMark{m.seq, m.js})
		}
		s.sinceAck++
		s.streamBytes += uint64(len(m.subject) + len(m.data))
		s.dirty = true
		if mt := s.o.Metrics; mt != nil {
			mt.StreamLag.Set(float64(m.pending))
		}
	}
	s.messages.Add(1)
	if mt := s.o.Metrics; mt != nil {
		mt.Messages.Inc()
	}
	id, ok := strings.CutPrefix(m.subject, s.prefix)
	if !ok || id == "" {
		s.deadLetter(m.subject, m.data, ReasonMalformed, fmt.Errorf("subject %q has no sensor id after %q", m.subject, s.prefix), nil)
		return
	}
	ref, err := s.ref(id)
	if err != nil {
		s.deadLetter(m.subject, m.data, reasonForRoute(err), err, nil)
		return
	}
	// Only a route sweep may forget needs the count; a made sensor's
	// route stays, and its jobs leave the shared counter alone.
	counted := !ref.made.Load()
	if counted {
		ref.inflight.Add(1)
	}
	b := s.batchFor(ref.worker)
	b.jobs = append(b.jobs, job{ref: ref, data: m.data, seq: m.seq, counted: counted})
	s.dirty = true
	if len(b.jobs) >= jobsPerBatch {
		s.flushWorker(ref.worker)
	}
}

// deadLetter counts refused input and republishes the message to the
// rejected subject with the reasons in headers. rejects lists per-reading
// problems of a payload whose other readings were kept.
// It is safe for concurrent use.
func (s *Service) deadLetter(subject string, data []byte, reason Reason, cause error, rejects []Reject) {
	n := max(1, len(rejects))
	s.rejected.Add(uint64(n))
	if mt := s.o.Metrics; mt != nil {
		if len(rejects) == 0 {
			mt.Rejected.WithLabelValues(reason.String()).Inc()
		}
		for _, r := range rejects {
			mt.Rejected.WithLabelValues(r.Reason.String()).Inc()
		}
	}
	s.badLog.Warn().Str("subject", QuoteID(subject)).Str("reason", reason.String()).Int("n", n).Err(cause).Msg("input rejected")
	msg := nats.NewMsg(s.o.RejectedSubject)
	msg.Data = data
	msg.Header.Set(HeaderReason, reason.String())
	if cause != nil {
		msg.Header.Set(HeaderError, cause.Error())
	}
	// A subject may hold bytes that break a header line or a terminal
	// (a NUL, an escape): those are sent quoted.
	if CheckSensorID(subject) != nil {
		subject = QuoteID(subject)
	}
	msg.Header.Set(HeaderSubject, subject)
	if len(rejects) > 0 {
		var sb strings.Builder
		for i, r := range rejects {
			if i > 0 {
				sb.WriteByte(',')
			}
			sb.WriteString(strconv.Itoa(r.Index))
			sb.WriteByte(':')
			sb.WriteString(r.Reason.String())
		}
		msg.Header.Set(HeaderRejected, sb.String())
	}
	if err := s.o.Conn.PublishMsg(msg); err != nil {
		s.badLog.Error().Err(err).Str("subject", s.o.RejectedSubject).Msg("dead letter not published")
	}
}

func (s *Service) batchFor(w int) *workBatch {
	b := s.pending[w]
	if b == nil {
		b = s.workers[w].getBatch()
		s.pending[w] = b
	}
	return b
}

func (s *Service) flushWorker(w int) {
	if b := s.pending[w]; b != nil {
		s.workers[w].in <- b
		s.pending[w] = nil
	}
}

func (s *Service) flush() {
	for w := range s.pending {
		s.flushWorker(w)
	}
}
