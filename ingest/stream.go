package ingest

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"driftfit/store"
)

// StreamChangedError is returned by Run when the readings stream is not
// the one the DB's position was taken in: it was deleted and made again,
// or replaced, so its sequence numbers mean other messages. It unwraps to
// ErrStreamChanged.
type StreamChangedError struct {
	Stored   store.StreamID // what the DB recorded; zero for a file that recorded none
	Found    store.StreamID // the stream on the bus now
	Position uint64         // the DB's position
	LastSeq  uint64         // the last sequence the stream has ever held
}

func (e *StreamChangedError) Error() string {
	what := fmt.Sprintf("the state file's position %d was taken in stream %s, the bus has %s (last sequence %d)", e.Position, e.Stored, e.Found, e.LastSeq)
	if e.Stored.IsZero() {
		what = fmt.Sprintf("the state file's position %d lies beyond the last sequence %d of stream %s", e.Position, e.LastSeq, e.Found)
	}
	return "ingest: " + what + ": reading on would skip its messages up to the position; to read it from its start, restart with the position reset (serve --reset-position), or point bus.stream_name at the stream the file was written from"
}

// Unwrap returns ErrStreamChanged.
func (e *StreamChangedError) Unwrap() error { return ErrStreamChanged }

// streamSource feeds the dispatcher from a durable pull consumer that it
// makes anew from a given sequence whenever asked: at start from the DB's
// position, and after a gap from the last applied message. It also purges
// what was committed and watches the stream's fill. One goroutine, run,
// owns the consumer; stop ends it and waits.
type streamSource struct {
	s      *Service
	js     jetstream.JetStream
	stream jetstream.Stream
	id     store.StreamID
	in     chan message

	// gen counts the consumers made; each message carries the gen of the
	// consumer that delivered it, so the dispatcher can drop what an
	// abandoned consumer still delivers.
	gen     atomic.Uint64
	resumes chan uint64 // sequences to make the consumer anew from
	quit    chan struct{}
	// ctx bounds the bus requests of run and purge; stop cancels it, so
	// a request to a server gone away does not hold up a shutdown.
	ctx    context.Context
	cancel context.CancelFunc
	wg     sync.WaitGroup // run and purge
	once   sync.Once
}

// startStream makes or checks the streams, checks the stream against the
// DB, and starts consuming after the DB's position.
func (s *Service) startStream(ctx context.Context, in chan message) (*streamSource, error) {
	js, err := jetstream.New(s.o.Conn)
	if err != nil {
		return nil, err
	}
	src := &streamSource{s: s, js: js, in: in, resumes: make(chan uint64, 1), quit: make(chan struct{})}
	checked := false
	// An existing stream is checked against the DB, and what the DB holds
	// purged, before its limits are set: a stream of an earlier version
	// holds every reading ever sent. (A byte limit below what it still
	// holds makes the server refuse new readings, not drop old ones, with
	// discard-new: TestService_StreamOfEarlierVersion.)
	existing := func(st jetstream.Stream) error {
		checked = true
		if err := src.checkIdentity(st.CachedInfo()); err != nil {
			return err
		}
		if pos := s.position.Load(); pos > 0 {
			if err := st.Purge(ctx, jetstream.WithPurgeSequence(pos+1)); err != nil {
				s.log.Warn().Err(err).Uint64("position", pos).Msg("stream purge failed; retried with the next commit")
			}
		}
		return nil
	}
	stream, err := s.ensureStream(ctx, js, jetstream.StreamConfig{
		Name:      s.o.StreamName,
		Subjects:  []string{s.prefix + ">"},
		Storage:   jetstream.FileStorage,
		Retention: jetstream.LimitsPolicy,
		// Refuse new readings when full rather than drop old ones: an
		// old reading may not be applied yet, while a producer that
		// publishes with acknowledgements sees a refusal and can retry.
		Discard:  jetstream.DiscardNew,
		MaxBytes: s.o.StreamMaxBytes,
		MaxAge:   s.o.StreamMaxAge,
	}, existing)
	if err != nil {
		return nil, err
	}
	src.stream = stream
	info := stream.CachedInfo()
	if !checked {
		if err := src.checkIdentity(info); err != nil {
			return nil, err
		}
	}
	if _, err := s.ensureStream(ctx, js, jetstream.StreamConfig{
		Name:     s.o.RejectedStream,
		Subjects: []string{s.o.RejectedSubject},
		Storage:  jetstream.FileStorage,
		Discard:  jetstream.DiscardOld,
		MaxBytes: s.o.RejectedMaxBytes,
		MaxAge:   s.o.RejectedMaxAge,
	}, nil); err != nil {
		return nil, err
	}
	src.watch(info)
	// Messages after the position that the stream no longer holds show
	// as a gap at the first message (see Service.handle).
	pos := s.position.Load()
	s.appliedSeq.Store(pos)
	cc, err := src.consume(ctx, pos+1)
	if err != nil {
		return nil, err
	}
	src.ctx, src.cancel = context.WithCancel(context.Background())
	src.wg.Add(2)
	go src.run(cc)
	go src.purge()
	return src, nil
}

// ensureStream makes the stream of cfg, or brings the limits of an
// existing one to cfg's after calling existing (if not nil) on it. Its
// subjects are left as they are.
func (s *Service) ensureStream(ctx context.Context, js jetstream.JetStream, cfg jetstream.StreamConfig, existing func(jetstream.Stream) error) (jetstream.Stream, error) {
	st, err := js.Stream(ctx, cfg.Name)
	if errors.Is(err, jetstream.ErrStreamNotFound) {
		st, err = js.CreateStream(ctx, cfg)
		if err != nil {
			return nil, fmt.Errorf("ingest: create stream %s (max %d bytes): %w; a server's JetStream store must hold every stream's max_bytes (bus.stream_max_bytes, bus.rejected_max_bytes)", cfg.Name, cfg.MaxBytes, err)
		}
		s.log.Info().Str("stream", cfg.Name).Strs("subjects", cfg.Subjects).Int64("max_bytes", cfg.MaxBytes).Dur("max_age", cfg.MaxAge).Msg("stream created")
		return st, nil
	}
	if err != nil {
		return nil, fmt.Errorf("ingest: stream %s: %w", cfg.Name, err)
	}
	if existing != nil {
		if err := existing(st); err != nil {
			return nil, err
		}
	}
	have := st.CachedInfo().Config
	if have.MaxBytes == cfg.MaxBytes && have.MaxAge == cfg.MaxAge && have.Discard == cfg.Discard {
		return st, nil
	}
	up := have
	up.MaxBytes, up.MaxAge, up.Discard = cfg.MaxBytes, cfg.MaxAge, cfg.Discard
	if st, err = js.UpdateStream(ctx, up); err != nil {
		return nil, fmt.Errorf("ingest: set limits of stream %s (max %d bytes, max age %v): %w", cfg.Name, cfg.MaxBytes, cfg.MaxAge, err)
	}
	s.log.Info().Str("stream", cfg.Name).Int64("max_bytes", cfg.MaxBytes).Dur("max_age", cfg.MaxAge).
		Int64("was_max_bytes", have.MaxBytes).Dur("was_max_age", have.MaxAge).Msg("stream limits updated")
	return st, nil
}

// checkIdentity compares the stream with the one the DB's position was
// taken in, records it if the DB has none, and resets the position if
// they differ and Options.ResetPosition allows it.
func (src *streamSource) checkIdentity(info *jetstream.StreamInfo) error {
	s := src.s
	src.id = store.StreamID{Name: info.Config.Name, Created: info.Created.UTC()}
	stored, err := s.o.DB.Stream()
	if err != nil {
		return err
	}
	pos := s.position.Load()
	// Purges keep the sequence count, so no position taken in this
	// stream lies beyond its last sequence.
	same := stored.Equal(src.id) || stored.IsZero() && pos <= info.State.LastSeq
	if same && pos <= info.State.LastSeq {
		if stored.IsZero() {
			if err := s.o.DB.SetStream(src.id, false); err != nil {
				return err
			}
			s.log.Info().Str("stream", src.id.Name).Time("created", src.id.Created).Uint64("position", pos).Msg("stream identity recorded")
		}
		return nil
	}
	cerr := &StreamChangedError{Stored: stored, Found: src.id, Position: pos, LastSeq: info.State.LastSeq}
	if !s.o.ResetPosition {
		return cerr
	}
	if err := s.o.DB.SetStream(src.id, true); err != nil {
		return err
	}
	s.log.Warn().Err(cerr).Uint64("position", pos).Msg("stream position reset: reading the stream from its start")
	s.position.Store(0)
	s.lastSeq = 0
	s.appliedSeq.Store(0)
	// So do the sensors' own sequences, which the DB reset with it. No
	// worker has a job yet: the dispatcher may still touch their state.
	for _, ref := range s.refs {
		ref.st.savedSeq, ref.st.lastSeq, ref.st.firstSeq = 0, 0, 0
	}
	return nil
}

// consume makes the consumer anew, delivering from sequence from, and
// starts consuming it under a new generation.
func (src *streamSource) consume(ctx context.Context, from uint64) (jetstream.ConsumeContext, error) {
	s := src.s
	// The DB's position, not the consumer's, says where to resume.
	if err := src.js.DeleteConsumer(ctx, s.o.StreamName, s.o.Durable); err != nil && !errors.Is(err, jetstream.ErrConsumerNotFound) {
		return nil, fmt.Errorf("ingest: reset consumer %s: %w", s.o.Durable, err)
	}
	cfg := jetstream.ConsumerConfig{
		Durable:       s.o.Durable,
		AckPolicy:     jetstream.AckAllPolicy,
		AckWait:       time.Minute,
		MaxAckPending: maxAckPending,
		// The filter is every subject of the stream, so the consumer
		// sees every stream sequence: one missing from what it delivers
		// is a gap (see Service.handle).
		FilterSubject: s.prefix + ">",
		DeliverPolicy: jetstream.DeliverAllPolicy,
	}
	if from > 1 {
		cfg.DeliverPolicy, cfg.OptStartSeq = jetstream.DeliverByStartSequencePolicy, from
	}
	cons, err := src.js.CreateConsumer(ctx, s.o.StreamName, cfg)
	if err != nil {
		return nil, fmt.Errorf("ingest: create consumer %s: %w", s.o.Durable, err)
	}
	gen := src.gen.Add(1)
	cc, err := cons.Consume(func(m jetstream.Msg) {
		md, err := m.Metadata()
		if err != nil {
			s.log.Warn().Err(err).Str("subject", QuoteID(m.Subject())).Msg("message without stream metadata skipped")
			return
		}
		select {
		case src.in <- message{subject: m.Subject(), data: m.Data(), seq: md.Sequence.Stream, pending: md.NumPending, js: m, gen: gen}:
		case <-src.quit:
		}
	}, jetstream.PullMaxMessages(2048), jetstream.ConsumeErrHandler(func(_ jetstream.ConsumeContext, err error) {
		s.log.Warn().Err(err).Msg("stream consumer")
		if errors.Is(err, jetstream.ErrConsumerDeleted) {
			// Someone else deleted it: make it again after what was
			// applied.
			src.resume(s.appliedSeq.Load() + 1)
		}
	}))
	if err != nil {
		return nil, fmt.Errorf("ingest: consume: %w", err)
	}
	return cc, nil
}

// resume asks run to make the consumer anew from sequence from. Safe for
// concurrent use; a pending request is replaced.
func (src *streamSource) resume(from uint64) {
	for {
		select {
		case src.resumes <- from:
			return
		default:
		}
		select {
		case <-src.resumes:
		default:
		}
	}
}

// run owns the consumer until stop: it makes it anew on request and
// checks the stream's fill every Options.CheckInterval.
func (src *streamSource) run(cc jetstream.ConsumeContext) {
	s := src.s
	defer src.wg.Done()
	tick := time.NewTicker(s.o.CheckInterval)
	defer tick.Stop()
	for {
		select {
		case <-src.quit:
			cc.Stop()
			select {
			case <-cc.Closed():
			case <-time.After(s.o.StopTimeout):
				s.log.Warn().Dur("waited", s.o.StopTimeout).Msg("stream consumer not stopped in time")
			}
			return
		case from := <-src.resumes:
			cc.Stop()
			for {
				ctx, cancel := context.WithTimeout(src.ctx, 10*time.Second)
				err := src.checkStream(ctx)
				var next jetstream.ConsumeContext
				if err == nil {
					next, err = src.consume(ctx, from)
				}
				cancel()
				if err == nil {
					cc = next
					s.log.Info().Uint64("from", from).Uint64("consumer", src.gen.Load()).Msg("stream consumer made anew")
					break
				}
				var cerr *StreamChangedError
				if errors.As(err, &cerr) {
					s.fail(err)
					<-src.quit
					return
				}
				s.log.Warn().Err(err).Uint64("from", from).Msg("stream consumer not made; retrying")
				select {
				case <-src.quit:
					return
				case <-time.After(time.Second):
				}
			}
		case <-tick.C:
			ctx, cancel := context.WithTimeout(src.ctx, 10*time.Second)
			info, err := src.stream.Info(ctx)
			cancel()
			if err != nil {
				s.log.Warn().Err(err).Str("stream", s.o.StreamName).Msg("stream state not read")
				continue
			}
			src.watch(info)
		}
	}
}

// purgeReq is a committed stream position, with the bytes taken up to
// the cut of its commit (Service.streamBytes; the position may lie a
// little before the cut, so the bytes are an upper bound).
type purgeReq struct{ seq, bytes uint64 }

// purge purges committed messages (purgeTo) until stop: once
// Options.PurgeInterval has passed since the last purge, or at once when
// what is committed and not purged reaches an eighth of the stream's
// limit, so the stream keeps at least seven eighths of its limit for
// messages not yet applied. It has its own goroutine: a purge sent just
// before a disconnect waits out its timeout, which must not hold up
// making the consumer anew.
func (src *streamSource) purge() {
	s := src.s
	defer src.wg.Done()
	var purged, want purgeReq
	every := s.o.PurgeInterval
	soon := uint64(max(s.o.StreamMaxBytes/8, 1))
	tick := time.NewTicker(every)
	defer tick.Stop()
	last := time.Now()
	for {
		select {
		case <-src.quit:
			return
		case r := <-s.purges:
			if r.seq > want.seq {
				want = r
			}
			if want.bytes-purged.bytes < soon && time.Since(last) < every {
				continue
			}
		case <-tick.C:
		}
		if want.seq <= purged.seq {
			continue
		}
		ctx, cancel := context.WithTimeout(src.ctx, 10*time.Second)
		// Keep seq+1 on: everything up to seq is committed.
		err := src.stream.Purge(ctx, jetstream.WithPurgeSequence(want.seq+1))
		cancel()
		if err != nil {
			s.log.Warn().Err(err).Uint64("position", want.seq).Msg("stream purge failed; retried later")
			continue
		}
		purged, last = want, time.Now()
	}
}

// checkStream fails if the stream is no longer the one consumed.
func (src *streamSource) checkStream(ctx context.Context) error {
	info, err := src.stream.Info(ctx)
	if err != nil {
		return err
	}
	if found := (store.StreamID{Name: info.Config.Name, Created: info.Created.UTC()}); !found.Equal(src.id) {
		return &StreamChangedError{Stored: src.id, Found: found, Position: src.s.appliedSeq.Load(), LastSeq: info.State.LastSeq}
	}
	return nil
}

// fullWarn is the fill of the readings stream, as a fraction of its
// limit, from which each check warns: producers are refused at 1.
const fullWarn = 0.9

// watch publishes the stream's fill and warns when it nears the limit.
func (src *streamSource) watch(info *jetstream.StreamInfo) {
	s := src.s
	limit := info.Config.MaxBytes
	if m := s.o.Metrics; m != nil {
		m.StreamBytes.Set(float64(info.State.Bytes))
		m.StreamLimitBytes.Set(float64(limit))
	}
	if limit > 0 && float64(info.State.Bytes) >= fullWarn*float64(limit) {
		s.log.Warn().Str("stream", info.Config.Name).Uint64("bytes", info.State.Bytes).Int64("max_bytes", limit).
			Uint64("messages", info.State.Msgs).Msg("readings stream nearly full: new readings are refused to producers once full")
	}
}

// stop ends run and waits for it. Idempotent.
func (src *streamSource) stop() {
	src.once.Do(func() { close(src.quit); src.cancel() })
	src.wg.Wait()
}

// lost counts n stream messages after position that are gone before they
// were applied (aged out, deleted, or never delivered again).
func (s *Service) lost(n, position uint64) {
	if m := s.o.Metrics; m != nil {
		m.StreamLost.Add(float64(n))
	}
	s.log.Error().Uint64("messages", n).Uint64("position", position).Str("stream", s.o.StreamName).
		Msg("stream messages lost before they were applied")
}

// purgeTo asks for the readings stream to forget messages up to seq, all
// committed: the file, not the bus, holds them from now on. The committer
// calls it after each commit that advanced the position; it never blocks,
// and a later call replaces one not yet done. No-op in direct mode.
func (s *Service) purgeTo(r purgeReq) {
	if s.o.Mode != ModeStream || r.seq == 0 {
		return
	}
	for {
		select {
		case s.purges <- r:
			return
		default:
		}
		select {
		case <-s.purges:
		default:
		}
	}
}
