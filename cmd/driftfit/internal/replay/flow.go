package replay

import (
	"bytes"
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"driftfit/alert"
	"driftfit/cmd/driftfit/internal/query"
	"driftfit/cmd/driftfit/internal/report"
	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// Sizes of a replay through the service.
const (
	// flowChunkRows is how many rows are read before they are published:
	// within a chunk the rows of one sensor travel in one message (see
	// FlowOptions), so a file of interleaved sensors still sends batches.
	flowChunkRows = 1 << 16
	// flowMsgReadings caps the readings of one message: about 36 KB of
	// columnar batch, far below the default 1 MiB payload limit; a
	// smaller bus.max_payload_bytes lowers it (see maxReadings).
	flowMsgReadings = 1024
	// batchReadingBytes is the most one reading adds to a columnar
	// batch: a time of 30 bytes (sign, 19 digits, point, 9 decimals), a
	// value of 24 ("-2.2250738585072014e-308") and two commas.
	batchReadingBytes = 56
	// flowCommitReadings is the service's CommitReadings in a replay, and
	// twice it the readings published ahead of the last commit. Until a
	// commit the service holds every pane close's solution (1 KB a
	// window) and the panes it changed, so the bound keeps a replay's
	// memory flat whatever the size of the file (a first try without it
	// grew to 1.3 GB on 345,600 hourly readings, each closing two panes);
	// a commit of 50,000 readings starts while the next 50,000 are
	// applied, so the committer is never idle for want of readings.
	flowCommitReadings = 50000
	// flowAckPending is the client's limit of publications awaiting
	// the stream's acknowledgement.
	flowAckPending = 4096
	// flowPoll is the wait between two looks at the service's counters.
	flowPoll = time.Millisecond
)

// FlowOptions are the settings of a replay through the service.
//
// The readings of the file are published in file order on an embedded
// NATS server (JetStream, the stream in memory and emptied as the
// service acknowledges) to an ingest.Service on a scratch state file:
// the same flow as serve, so the same alert events and tickets. Within a
// chunk of 65,536 rows the readings of one sensor go in one message (at
// most 1,024 a message), in the order of its first row: a sensor's own
// readings keep their order, which is all its windows and alert rule
// see. Members of a peer group are compared with each other, so their
// readings keep their order among the group's rows: a member's message
// ends where another member's row comes.
type FlowOptions struct {
	CSV ingest.CSVOptions
	// Strict stops at the first bad row of the file with its error.
	Strict bool
	// Service returns the options of the service for its bus connection
	// and state file: serve's own mapping of the configuration. Replay
	// then keeps what a replay must: stream mode (direct mode may drop
	// readings under a flood), no webhook (tickets of the past must not
	// reach a live receiver), no pruning or thinning of fit history.
	Service func(db *store.DB) ingest.Options
	// Calibrations, sorted by time (ReadCalibrations), are sent on the
	// calibration subject as the readings reach them: a sensor's
	// calibration goes out just before the first row of that sensor at
	// or after its time, once every reading published before it has been
	// taken, and after the last row for the rest.
	Calibrations []Calibration
	// Errors receives the first bad rows and refused readings, one a
	// line, and the progress lines. Nil: discarded.
	Errors io.Writer
	// ProgressEvery is the interval of the progress lines; 0 means 5s.
	ProgressEvery time.Duration
	// TempDir is where the scratch directory (bus store, state file) is
	// made and removed; empty: os.TempDir().
	TempDir string
}

// TicketRevision is one state of a ticket, its opening or its closing,
// with the time it arose: Opened for an opening, the calibration's time
// for a closing.
type TicketRevision struct {
	At     time.Time
	Ticket alert.Ticket
}

// FlowResult is what a replay through the service decided.
type FlowResult struct {
	// Events are the stored alert events, by time, then sensor (serve
	// stores the events of one instant in the order its commits wrote
	// them, which across sensors is arbitrary), a sensor's in the order
	// it made them.
	Events []alert.Event
	// Tickets are every revision of every ticket, by At (then sensor; a
	// sensor's in the order they were published).
	Tickets []TicketRevision

	Rows     int    // data rows read, good and bad
	Bad      int    // bad rows of the file, skipped
	Sensors  int    // sensors in the file
	Readings uint64 // readings published
	Stats    ingest.Stats
	// Calibrated and CalibrationsRefused count the calibrations the
	// service recorded and refused.
	Calibrated, CalibrationsRefused int
	Took                            time.Duration
}

// flowSensor is one sensor of the file.
type flowSensor struct {
	id    string
	route *flowRoute
	cals  []Calibration // this sensor's, by time; the head is next
	msg   int           // index of its open message in the chunk; -1: none
	chunk int           // chunk msg belongs to
	bad   error         // why the id cannot travel on the bus; its rows are bad rows
	max   int           // readings a message of this sensor holds
}

// flowRoute is what orders a sensor's messages: itself, or its peer
// group, whose members keep their order among the group's rows.
type flowRoute struct {
	group bool
	last  *flowSensor // member of the group's open message
	chunk int
}

// pubMark is one publication: its acknowledgement (the stream sequence)
// and the readings published up to and with it.
type pubMark struct {
	ack      jetstream.PubAckFuture
	seq      uint64 // stream sequence, once acknowledged; 0 before
	readings uint64
}

type flowMsg struct {
	s  *flowSensor
	rs []rolling.Reading
}

// flow is one replay through the service.
type flow struct {
	o      FlowOptions
	opts   ingest.Options
	svc    *ingest.Service
	nc     *nats.Conn
	js     jetstream.JetStream
	errs   *lockedWriter
	prefix string // readings subject prefix + "."

	sensors map[string]*flowSensor
	groups  map[string]*flowRoute

	chunk    int
	msgs     []flowMsg
	spare    [][]rolling.Reading
	res      FlowResult
	messages uint64 // messages published
	shown    int
	// marks are the publications not yet known committed, oldest first,
	// each with the readings published up to it; committed is the
	// readings of those known committed.
	marks     []pubMark
	committed uint64

	runDone chan struct{}
	runErr  error // set before runDone closes

	pubMu  sync.Mutex
	pubErr error // first failed publication

	tkMu    sync.Mutex
	tickets []alert.Ticket
	tkSeen  map[string]bool // Nats-Msg-Id of revisions received
	rejMu   sync.Mutex
	rejects []string // first dead letters, for Errors
}

// RunFlow replays the CSV of in through the service o.Service
// configures, with o.Calibrations at their times, and returns the alert
// events and ticket revisions it stored. Bad rows of the file are
// reported on o.Errors with their line and field, counted and skipped
// (with o.Strict the first ends the run); readings the service refuses
// are counted in Stats.Rejected and the first shown. A cancelled ctx
// stops the replay and returns its error.
func RunFlow(ctx context.Context, in io.Reader, o FlowOptions) (res *FlowResult, err error) {
	t0 := time.Now()
	cr, err := ingest.NewCSVReaderOptions(in, o.CSV)
	if err != nil {
		return nil, err
	}
	if o.Service == nil {
		return nil, errors.New("replay: FlowOptions.Service is required")
	}
	errw := o.Errors
	if errw == nil {
		errw = io.Discard
	}
	dir, err := os.MkdirTemp(o.TempDir, "driftfit-replay-")
	if err != nil {
		return nil, err
	}
	defer func() { err = errors.Join(err, os.RemoveAll(dir)) }()

	f := &flow{o: o, errs: &lockedWriter{w: errw}, sensors: map[string]*flowSensor{}, groups: map[string]*flowRoute{},
		tkSeen: map[string]bool{}, runDone: make(chan struct{})}
	ns, err := server.NewServer(&server.Options{
		ServerName: "driftfit-replay",
		DontListen: true, // in-process connections only: a replay opens no port
		JetStream:  true,
		StoreDir:   filepath.Join(dir, "nats"),
		NoLog:      true,
		NoSigs:     true,
	})
	if err != nil {
		return nil, fmt.Errorf("replay: embedded NATS server: %w", err)
	}
	go ns.Start()
	defer func() { ns.Shutdown(); ns.WaitForShutdown() }()
	if !ns.ReadyForConnections(10 * time.Second) {
		return nil, errors.New("replay: embedded NATS server not ready after 10s")
	}
	if f.nc, err = nats.Connect(ns.ClientURL(), nats.InProcessServer(ns), nats.Name("driftfit replay")); err != nil {
		return nil, err
	}
	defer f.nc.Close()
	db, err := store.Open(filepath.Join(dir, "driftfit.db"), store.Options{NoSync: true})
	if err != nil {
		return nil, err
	}
	defer func() { err = errors.Join(err, db.Close()) }()

	opts := o.Service(db)
	opts.Conn, opts.DB = f.nc, db
	opts.Mode = ingest.ModeStream
	opts.Webhook = ingest.Webhook{}
	// The fit history of a replay is never read, and its horizon would
	// be the wall clock's, not the file's: no pruning, no thinning.
	opts.HistoryRetention, opts.HistoryThinAfter = 0, 0
	// The state file is scratch: commits of a bounded size (see
	// flowCommitReadings) instead of serve's, which suit a live rate.
	opts.CommitReadings = flowCommitReadings
	if opts, err = opts.Filled(); err != nil {
		return nil, err
	}
	f.opts, f.prefix = opts, opts.SubjectPrefix+"."
	if err := f.subscribe(); err != nil {
		return nil, err
	}
	f.js, err = jetstream.New(f.nc, jetstream.WithPublishAsyncMaxPending(flowAckPending),
		jetstream.WithPublishAsyncErrHandler(func(_ jetstream.JetStream, m *nats.Msg, err error) {
			f.pubMu.Lock()
			if f.pubErr == nil {
				f.pubErr = fmt.Errorf("replay: publish on %s: %w", m.Subject, err)
			}
			f.pubMu.Unlock()
		}))
	if err != nil {
		return nil, err
	}
	// The stream is made here, in memory and with interest retention, so
	// what the service acknowledged (after its commits) leaves it: a
	// 10-million-row file never sits whole in the bus. The service finds
	// it and uses it. (A work queue would need explicit acks; the
	// service acknowledges all up to a commit's position.)
	if _, err := f.js.CreateStream(ctx, jetstream.StreamConfig{
		Name: opts.StreamName, Subjects: []string{f.prefix + ">"},
		Storage: jetstream.MemoryStorage, Retention: jetstream.InterestPolicy,
	}); err != nil {
		return nil, fmt.Errorf("replay: create stream %s: %w", opts.StreamName, err)
	}
	if f.svc, err = ingest.New(opts); err != nil {
		return nil, err
	}
	runCtx, stop := context.WithCancel(context.WithoutCancel(ctx))
	defer stop()
	go func() { defer close(f.runDone); f.runErr = f.svc.Run(runCtx) }()
	stopped := false
	stopService := func() error {
		if stopped {
			return nil
		}
		stopped = true
		stop()
		<-f.runDone
		return f.runErr
	}
	defer func() { err = errors.Join(err, stopService()) }()
	// An interest stream keeps nothing while no consumer exists: publish
	// once the service's is made.
	if err := f.waitConsumer(ctx); err != nil {
		return nil, err
	}

	cals := slices.Clone(o.Calibrations)
	slices.SortStableFunc(cals, func(a, b Calibration) int { return a.Time.Compare(b.Time) })
	for _, c := range cals {
		if f.sensors[c.Sensor] == nil {
			f.sensors[c.Sensor] = &flowSensor{id: c.Sensor, msg: -1}
		}
		f.sensors[c.Sensor].cals = append(f.sensors[c.Sensor].cals, c)
	}

	progress := f.startProgress(t0)
	err = f.feed(ctx, cr)
	if err == nil {
		err = f.calibrateRest(ctx)
	}
	if err == nil {
		err = f.settle(ctx)
	}
	progress()
	if err != nil {
		return nil, err
	}
	if err := stopService(); err != nil {
		return nil, err
	}
	f.res.Stats = f.svc.Stats()
	f.rejMu.Lock()
	for _, r := range f.rejects {
		f.errs.printf("driftfit replay: refused by the service: %s\n", r)
	}
	if len(f.rejects) == maxShownErrors {
		f.errs.printf("driftfit replay: later refusals not shown; the summary counts them all\n")
	}
	f.rejMu.Unlock()
	if err := f.collect(db); err != nil {
		return nil, err
	}
	f.res.Took = time.Since(t0)
	return &f.res, nil
}

// waitConsumer waits until the service made its consumer of the stream.
func (f *flow) waitConsumer(ctx context.Context) error {
	deadline := time.Now().Add(time.Minute)
	for {
		_, err := f.js.Consumer(ctx, f.opts.StreamName, f.opts.Durable)
		if err == nil {
			return nil
		}
		if !errors.Is(err, jetstream.ErrConsumerNotFound) || time.Now().After(deadline) {
			return fmt.Errorf("replay: the service's consumer %s: %w", f.opts.Durable, err)
		}
		select {
		case <-f.runDone:
			return f.stoppedEarly()
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(10 * flowPoll):
		}
	}
}

// subscribe collects every ticket revision the service publishes (the
// state file keeps only a ticket's latest) and the first dead letters.
func (f *flow) subscribe() error {
	sub, err := f.nc.Subscribe(f.opts.TicketSubject, func(m *nats.Msg) {
		var tk alert.Ticket
		if err := json.Unmarshal(m.Data, &tk); err != nil {
			return // not a ticket of ours: nothing else publishes here in a replay
		}
		id := m.Header.Get(nats.MsgIdHdr)
		f.tkMu.Lock()
		defer f.tkMu.Unlock()
		if id != "" && f.tkSeen[id] {
			return // a repeat from the outbox, dropped by its id as any subscriber does
		}
		f.tkSeen[id] = true
		f.tickets = append(f.tickets, tk)
	})
	if err != nil {
		return err
	}
	// Revisions are few (two a ticket): a generous buffer keeps the
	// client from dropping any while the reader is busy.
	if err := sub.SetPendingLimits(-1, -1); err != nil {
		return err
	}
	if _, err = f.nc.Subscribe(f.opts.RejectedSubject, func(m *nats.Msg) {
		f.rejMu.Lock()
		defer f.rejMu.Unlock()
		if len(f.rejects) < maxShownErrors {
			f.rejects = append(f.rejects, fmt.Sprintf("%s: %s: %s", strings.TrimPrefix(m.Header.Get(ingest.HeaderSubject), f.prefix),
				m.Header.Get(ingest.HeaderReason), m.Header.Get(ingest.HeaderError)))
		}
	}); err != nil {
		return err
	}
	return f.nc.Flush()
}

// feed reads the file and publishes its readings chunk by chunk,
// sending each calibration when its sensor's readings reach its time.
func (f *flow) feed(ctx context.Context, cr *ingest.CSVReader) error {
	rows := 0
	for cr.Next() {
		f.res.Rows++
		id, rd, err := cr.Row()
		if err != nil {
			if f.o.Strict {
				return err
			}
			f.badRow(err)
			continue
		}
		s := f.sensor(id)
		if s.bad != nil {
			err := fmt.Errorf("line %d: sensor %s: %w", cr.Line(), strconv.Quote(s.id), s.bad)
			if f.o.Strict {
				return err
			}
			f.badRow(err)
			continue
		}
		for len(s.cals) > 0 && rd.UnixNano >= s.cals[0].Time.UnixNano() {
			if err := f.publishChunk(ctx); err != nil {
				return err
			}
			rows = 0
			if err := f.calibrate(ctx, s.cals[0], true); err != nil {
				return err
			}
			s.cals = s.cals[1:]
		}
		f.add(s, rd)
		if rows++; rows >= flowChunkRows {
			if err := f.publishChunk(ctx); err != nil {
				return err
			}
			rows = 0
		}
	}
	if err := cr.Err(); err != nil {
		return err
	}
	return f.publishChunk(ctx)
}

// sensor returns the sensor of id, making it on first sight.
func (f *flow) sensor(id []byte) *flowSensor {
	s := f.sensors[string(id)]
	if s == nil {
		s = &flowSensor{id: string(id), msg: -1}
		f.sensors[s.id] = s
	}
	if s.route == nil {
		f.res.Sensors++
		s.route = &flowRoute{}
		if s.bad = f.checkID(s.id); s.bad != nil {
			return s
		}
		// The payload limit holds for the worst case of every reading
		// (batchReadingBytes), around the id written with escapes.
		s.max = min(flowMsgReadings, max(1, (f.opts.MaxPayload-40-2*len(s.id))/batchReadingBytes))
		// The service's own lookup says which peer group the sensor is
		// in; a sensor it has no configuration for is refused there.
		if cfg, err := f.opts.Sensor(s.id); err == nil && cfg.Group != "" {
			g := f.groups[cfg.Group]
			if g == nil {
				g = &flowRoute{group: true}
				f.groups[cfg.Group] = g
			}
			s.route = g
		}
	}
	return s
}

// ErrSensorID is the cause of a bad row whose sensor id cannot be the
// last tokens of a NATS subject, as serve receives every reading.
var ErrSensorID = errors.New("not a sensor id the bus can carry")

// checkID reports an id serve could never receive: the readings subject
// is <prefix>.<id>, whose tokens are non-empty, hold no space or control
// byte and are not the wildcards * and >; and <prefix>.rejected is the
// dead letters'. The store's length limit applies too.
func (f *flow) checkID(id string) error {
	switch {
	case len(id) > store.MaxSensorID:
		return fmt.Errorf("%w: %d bytes, longer than %d", ErrSensorID, len(id), store.MaxSensorID)
	case f.prefix+id == f.opts.RejectedSubject:
		return fmt.Errorf("%w: %s is where refused readings go", ErrSensorID, f.opts.RejectedSubject)
	}
	for tok := range strings.SplitSeq(id, ".") {
		switch {
		case tok == "":
			return fmt.Errorf("%w: empty token between dots", ErrSensorID)
		case tok == "*" || tok == ">":
			return fmt.Errorf("%w: the wildcard %s", ErrSensorID, tok)
		case strings.IndexFunc(tok, func(r rune) bool { return r <= ' ' || r == 0x7f }) >= 0:
			return fmt.Errorf("%w: a space or control character", ErrSensorID)
		}
	}
	return nil
}

// add puts one reading into its sensor's open message of the chunk.
func (f *flow) add(s *flowSensor, rd rolling.Reading) {
	open := s.chunk == f.chunk && s.msg >= 0 && len(f.msgs[s.msg].rs) < s.max
	if r := s.route; r.group {
		open = open && r.chunk == f.chunk && r.last == s
		r.last, r.chunk = s, f.chunk
	}
	if !open {
		var rs []rolling.Reading
		if n := len(f.spare); n > 0 {
			rs, f.spare = f.spare[n-1][:0], f.spare[:n-1]
		}
		f.msgs = append(f.msgs, flowMsg{s: s, rs: rs})
		s.msg, s.chunk = len(f.msgs)-1, f.chunk
	}
	m := &f.msgs[s.msg]
	m.rs = append(m.rs, rd)
}

// publishChunk publishes the chunk's messages in order, each as a
// columnar batch, keeping at most flowAhead ahead of the service.
func (f *flow) publishChunk(ctx context.Context) error {
	for i := range f.msgs {
		m := &f.msgs[i]
		if f.res.Readings >= f.committed+2*flowCommitReadings {
			if err := f.wait(ctx, func(st ingest.Stats) bool {
				f.advance(st.Position)
				return f.res.Readings < f.committed+2*flowCommitReadings
			}); err != nil {
				return err
			}
		}
		// A fresh buffer a message: the client keeps it for a retry
		// until the stream acknowledges.
		data := ingest.AppendBatch(make([]byte, 0, 40+len(m.s.id)+36*len(m.rs)), m.s.id, m.rs)
		ack, err := f.publish(ctx, f.prefix+m.s.id, data)
		if err != nil {
			return err
		}
		f.messages++
		f.res.Readings += uint64(len(m.rs))
		f.marks = append(f.marks, pubMark{ack: ack, readings: f.res.Readings})
		f.spare = append(f.spare, m.rs)
		m.rs = nil
	}
	f.msgs = f.msgs[:0]
	f.chunk++
	return nil
}

func (f *flow) publish(ctx context.Context, subject string, data []byte) (jetstream.PubAckFuture, error) {
	for {
		ack, err := f.js.PublishAsync(subject, data)
		if !errors.Is(err, jetstream.ErrTooManyStalledMsgs) {
			if err == nil {
				err = f.publishErr()
			}
			return ack, err
		}
		// The stream is behind the client: wait for its acknowledgements,
		// then send this one (nothing was sent, so the order holds).
		select {
		case <-f.js.PublishAsyncComplete():
		case <-f.runDone:
			return nil, f.stoppedEarly()
		case <-ctx.Done():
			return nil, ctx.Err()
		}
	}
}

// advance drops the marks of publications the service committed: the
// stream sequence of each is at or below pos, the stored position.
func (f *flow) advance(pos uint64) {
	n := 0
	for ; n < len(f.marks); n++ {
		m := &f.marks[n]
		if m.seq == 0 {
			select {
			case a := <-m.ack.Ok(): // delivered once: kept in seq
				m.seq = a.Sequence
			default:
			}
		}
		if m.seq == 0 || m.seq > pos {
			break
		}
		f.committed = m.readings
	}
	clear(f.marks[:n])
	f.marks = f.marks[n:]
}

func (f *flow) publishErr() error {
	f.pubMu.Lock()
	defer f.pubMu.Unlock()
	return f.pubErr
}

// wait polls the service's counters until ok holds, the service stops,
// or ctx is done.
func (f *flow) wait(ctx context.Context, ok func(ingest.Stats) bool) error {
	for !ok(f.svc.Stats()) {
		select {
		case <-f.runDone:
			return f.stoppedEarly()
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(flowPoll):
		}
		if err := f.publishErr(); err != nil {
			return err
		}
	}
	return nil
}

func (f *flow) stoppedEarly() error {
	if f.runErr != nil {
		return fmt.Errorf("replay: service stopped: %w", f.runErr)
	}
	return errors.New("replay: service stopped before the readings were taken")
}

// taken waits until the stream acknowledged every publication and the
// service took every message published, so whatever is sent next is
// routed behind them.
func (f *flow) taken(ctx context.Context) error {
	select {
	case <-f.js.PublishAsyncComplete():
	case <-f.runDone:
		return f.stoppedEarly()
	case <-ctx.Done():
		return ctx.Err()
	}
	if err := f.publishErr(); err != nil {
		return err
	}
	return f.wait(ctx, func(st ingest.Stats) bool { return st.Messages >= f.messages })
}

// calibrate sends c on the calibration subject, once the readings
// before it are taken, and waits for the answer, which comes after the
// commit that stores it. A refusal is reported and counted; force
// records a sensor the service has not seen yet, as a sensor of the file
// calibrated before its first reading is no mistyped id.
func (f *flow) calibrate(ctx context.Context, c Calibration, force bool) error {
	if err := f.taken(ctx); err != nil {
		return err
	}
	msg, err := json.Marshal(ingest.CalibrationMsg{T: c.Time.Format(time.RFC3339Nano), AsFound: c.AsFound, AsLeft: c.AsLeft, Force: force})
	if err != nil {
		return err
	}
	rctx, cancel := context.WithTimeout(ctx, time.Minute)
	defer cancel()
	reply, err := f.nc.RequestWithContext(rctx, f.opts.CalibrationSubjectPrefix+"."+c.Sensor, msg)
	if err != nil {
		if ctx.Err() != nil {
			return ctx.Err()
		}
		return fmt.Errorf("replay: calibrations line %d: sensor %s: no answer from the service: %w", c.Line, strconv.Quote(c.Sensor), err)
	}
	var ans struct {
		OK    bool   `json:"ok"`
		Error string `json:"error"`
	}
	if err := json.Unmarshal(reply.Data, &ans); err != nil || !ans.OK {
		f.res.CalibrationsRefused++
		why := cmp.Or(ans.Error, string(reply.Data))
		f.errs.printf("driftfit replay: calibrations line %d: sensor %s at %s refused: %s\n", c.Line, strconv.Quote(c.Sensor),
			c.Time.Format(time.RFC3339), why)
		return nil
	}
	f.res.Calibrated++
	return nil
}

// calibrateRest sends the calibrations no reading of their sensor
// reached, in time order, after the last row. A sensor with no reading
// in the file is sent unforced: the service refuses it as unknown, the
// usual sign of a mistyped id.
func (f *flow) calibrateRest(ctx context.Context) error {
	var rest []Calibration
	inFile := map[string]bool{}
	for _, s := range f.sensors {
		rest = append(rest, s.cals...)
		inFile[s.id] = s.route != nil
		s.cals = nil
	}
	slices.SortStableFunc(rest, func(a, b Calibration) int {
		return cmp.Or(a.Time.Compare(b.Time), cmp.Compare(a.Line, b.Line))
	})
	for _, c := range rest {
		if err := f.checkID(c.Sensor); err != nil {
			f.res.CalibrationsRefused++
			f.errs.printf("driftfit replay: calibrations line %d: sensor %s: %v\n", c.Line, strconv.Quote(c.Sensor), err)
			continue
		}
		if err := f.calibrate(ctx, c, inFile[c.Sensor]); err != nil {
			return err
		}
	}
	return nil
}

// settle waits until the service took every message; stopping it then
// applies, commits and publishes all of it.
func (f *flow) settle(ctx context.Context) error { return f.taken(ctx) }

// collect reads the stored events and completes the ticket revisions:
// every stored ticket's latest version must be among those received
// (the outbox publishes them before the service stops); one that is not
// yet is waited for, then taken from the file.
func (f *flow) collect(db *store.DB) error {
	evs, err := query.Events(db, query.Filter{})
	if err != nil {
		return err
	}
	slices.SortStableFunc(evs, func(a, b alert.Event) int { return cmp.Or(a.At.Compare(b.At), strings.Compare(a.Sensor, b.Sensor)) })
	f.res.Events = evs
	stored, err := query.Tickets(db, query.Filter{})
	if err != nil {
		return err
	}
	if err := f.nc.Flush(); err != nil {
		return err
	}
	deadline := time.Now().Add(5 * time.Second)
	for {
		missing := f.missing(stored)
		if len(missing) == 0 {
			break
		}
		if time.Now().After(deadline) {
			for _, tk := range missing {
				f.errs.printf("driftfit replay: ticket %s: revision not seen on the bus; its stored version is shown\n", tk.ID)
				f.tkMu.Lock()
				f.tickets = append(f.tickets, tk)
				f.tkMu.Unlock()
			}
			break
		}
		time.Sleep(10 * time.Millisecond)
	}
	f.tkMu.Lock()
	defer f.tkMu.Unlock()
	for _, tk := range f.tickets {
		at := tk.Opened
		switch {
		case tk.Calibration != nil:
			at = tk.Calibration.Time
		case tk.Revision > 0:
			at = tk.AsOf // a revision of the due date: when it was re-estimated
		}
		f.res.Tickets = append(f.res.Tickets, TicketRevision{At: at, Ticket: tk})
	}
	slices.SortStableFunc(f.res.Tickets, func(a, b TicketRevision) int {
		return cmp.Or(a.At.Compare(b.At), strings.Compare(a.Ticket.Sensor, b.Ticket.Sensor))
	})
	return nil
}

// missing returns the stored tickets whose latest version was not
// received.
func (f *flow) missing(stored []alert.Ticket) []alert.Ticket {
	f.tkMu.Lock()
	defer f.tkMu.Unlock()
	var out []alert.Ticket
	for _, st := range stored {
		found := false
		for _, tk := range f.tickets {
			if tk.ID == st.ID && tk.Revision == st.Revision && (tk.Calibration != nil) == (st.Calibration != nil) {
				found = true
				break
			}
		}
		if !found {
			out = append(out, st)
		}
	}
	return out
}

func (f *flow) badRow(err error) {
	f.res.Bad++
	if f.shown < maxShownErrors {
		f.shown++
		f.errs.printf("driftfit replay: %v\n", err)
	}
}

// startProgress prints a progress line every o.ProgressEvery until the
// returned function is called; that call waits until it stopped.
func (f *flow) startProgress(t0 time.Time) func() {
	every := cmp.Or(f.o.ProgressEvery, 5*time.Second)
	quit, done := make(chan struct{}), make(chan struct{})
	go func() {
		defer close(done)
		tick := time.NewTicker(every)
		defer tick.Stop()
		for {
			select {
			case <-quit:
				return
			case <-tick.C:
				st := f.svc.Stats()
				secs := time.Since(t0).Seconds()
				f.errs.printf("driftfit replay: %d readings applied, %d refused, %.0f a second\n", st.Applied, st.Rejected, float64(st.Applied)/secs)
			}
		}
	}()
	return func() { close(quit); <-done }
}

// WriteEvents writes the events on w as `driftfit alerts --format json`
// prints them, one a line.
func (r *FlowResult) WriteEvents(w io.Writer) error { return r.write(w, true, false) }

// WriteTickets writes the ticket revisions on w as `driftfit tickets
// --format json` prints a ticket, with "at" first: the reading time at
// which that revision arose.
func (r *FlowResult) WriteTickets(w io.Writer) error { return r.write(w, false, true) }

// WriteAll writes events and ticket revisions on w, merged by time; at
// the same instant an event comes before a ticket (a raise before the
// ticket it opens).
func (r *FlowResult) WriteAll(w io.Writer) error { return r.write(w, true, true) }

func (r *FlowResult) write(w io.Writer, events, tickets bool) error {
	var buf bytes.Buffer
	out, err := report.New("json", report.Events, &buf, report.Options{})
	if err != nil {
		return err
	}
	tout, err := report.New("json", report.Tickets, &buf, report.Options{})
	if err != nil {
		return err
	}
	evs, tks := r.Events, r.Tickets
	if !events {
		evs = nil
	}
	if !tickets {
		tks = nil
	}
	for len(evs) > 0 || len(tks) > 0 {
		buf.Reset()
		if len(evs) > 0 && (len(tks) == 0 || !tks[0].At.Before(evs[0].At)) {
			if err := out.Event(&evs[0]); err != nil {
				return err
			}
			evs = evs[1:]
		} else {
			if err := tout.Ticket(&tks[0].Ticket); err != nil {
				return err
			}
			if err := spliceAt(&buf, tks[0].At); err != nil {
				return err
			}
			tks = tks[1:]
		}
		if _, err := w.Write(buf.Bytes()); err != nil {
			return err
		}
	}
	return errors.Join(out.Close(), tout.Close())
}

// spliceAt puts "at" first into the one JSON object in buf.
func spliceAt(buf *bytes.Buffer, at time.Time) error {
	b := buf.Bytes()
	if len(b) < 2 || b[0] != '{' {
		return fmt.Errorf("replay: ticket line %q is not a JSON object", b)
	}
	ts, err := json.Marshal(at)
	if err != nil {
		return err
	}
	line := append([]byte(`{"at":`), ts...)
	if b[1] != '}' {
		line = append(line, ',')
	}
	line = append(line, b[1:]...)
	buf.Reset()
	buf.Write(line)
	return nil
}

// Summary writes on w what the replay read, published, applied and
// decided, and its speed.
func (r *FlowResult) Summary(w io.Writer) error {
	opened, closed := 0, 0
	for _, t := range r.Tickets {
		if t.Ticket.Calibration != nil {
			closed++
		} else {
			opened++
		}
	}
	secs := r.Took.Seconds()
	_, err := fmt.Fprintf(w, "driftfit replay: %d rows (%d bad), %d sensors; %d readings published, %d applied, %d refused by the service; "+
		"%d calibrations recorded, %d refused; %d alert events, %d tickets opened, %d closed; %.1f s, %.0f readings a second\n",
		r.Rows, r.Bad, r.Sensors, r.Readings, r.Stats.Applied, r.Stats.Rejected, r.Calibrated, r.CalibrationsRefused,
		len(r.Events), opened, closed, secs, float64(r.Stats.Applied)/max(secs, 1e-9))
	return err
}

// lockedWriter serialises the lines of the progress goroutine and the
// feed.
type lockedWriter struct {
	mu sync.Mutex
	w  io.Writer
}

func (l *lockedWriter) printf(format string, args ...any) {
	l.mu.Lock()
	defer l.mu.Unlock()
	fmt.Fprintf(l.w, format, args...)
}
