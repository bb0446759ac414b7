package daemon

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"time"

	"github.com/rs/zerolog"
	"golang.org/x/sync/errgroup"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/analyze"
	"trapline/daemon/bus"
	"trapline/ingest"
)

// stageOutput is what one step of a stream's analysis produced.
type stageOutput = pipeline.Output

// streamPipeline is the per-stream analysis as the stream runner drives it:
// samples and status changes in, breaths and alert events out. It is used
// from one goroutine only (the stream's analysis goroutine), so it needs no
// locks.
type streamPipeline interface {
	// Samples analyses a batch of samples in time order.
	Samples(ss []ingest.Sample) stageOutput
	// Status reports a change of the source's condition at wall time now.
	Status(ev ingest.Event, now time.Time) stageOutput
	// Tick lets time-based conditions (signal lost) advance at wall time now.
	Tick(now time.Time) stageOutput
	// Ack acknowledges the alarm with the given id.
	Ack(id, by string, now time.Time) (stageOutput, error)
	// Flush finishes what is pending at shutdown.
	Flush() stageOutput
	// Finding passes a finding about the program itself (an impaired
	// recording) through the alarm lifecycle at wall time now.
	Finding(f analyze.Finding, now time.Time) stageOutput
}

// alertSink makes alert events durable and delivers them; Publish returns
// once the event cannot be lost any more (it is in the spool or acknowledged
// by JetStream).
type alertSink interface {
	Publish(ctx context.Context, ev alerts.Event) error
}

// bulletinSink publishes breaths and status heartbeats without blocking;
// what it cannot send is counted and dropped.
type bulletinSink interface {
	Breath(b *analyze.Breath)
	Status(stream string, data []byte)
}

// streamSpec is what the runner needs to start one stream.
type streamSpec struct {
	ID string
	// Open returns the stream's source and a fresh pipeline; a restart
	// begins anew with both.
	Open func() (ingest.Source, streamPipeline, error)
	// QueueLen bounds the batches waiting between source and analysis.
	QueueLen int
	// TickEvery is the period of Tick.
	TickEvery time.Duration
	// StatusEvery is the period of the status heartbeat on NATS.
	StatusEvery time.Duration
	// Backoff is the restart policy; zero means defaultBackoff.
	Backoff restartPolicy
	// Finite marks a source that has an end (a file, stdin): when it
	// reaches it, the stream is finished rather than restarted, so that a
	// recording is analysed once and not replayed over and over.
	Finite bool
	// Overload is the source's resolved overload policy: OverloadBlock
	// makes the stream's queue wait for the analysis too.
	Overload ingest.OverloadPolicy
	// Health, when set, is asked on every tick for a finding about the
	// program itself (recording-impaired), judged like any other.
	Health func() analyze.Finding
	// Continuity, when set, resumes the pipeline from its checkpoint at
	// start and writes the checkpoint while running and at stop.
	Continuity *continuity
	// SourceStream is the default stream id the source's URL names
	// (?stream=), also accepted as this stream's own.
	SourceStream string
	// Ledger, when set, records alarms no checkpoint holds (ledger.go).
	Ledger *alarmLedger
}

// errFinished ends the supervision of a stream whose finite source reached
// its end.
var errFinished = errors.New("source reached its end")

// ackRequest carries an acknowledgement to the goroutine that owns the
// stream's pipeline.
type ackRequest struct {
	ID, By string
	Reply  chan error
}

// ackLine leads acknowledgements to one run of the analysis goroutine;
// done closes when that goroutine has stopped taking them.
type ackLine struct {
	ch   chan ackRequest
	done <-chan struct{}
}

// stream is one configured stream and its live state, shared with the
// health checks, the metrics and the ack handler.
type stream struct {
	spec   streamSpec
	log    zerolog.Logger
	m      *metrics
	alerts alertSink
	bull   bulletinSink
	// view is the live view, or nil; fed beside the bulletin.
	view viewSink

	up        atomic.Bool // pipeline running
	connected atomic.Bool // source reading
	breaths   atomic.Uint64
	active    atomic.Int64
	restarts  atomic.Uint64
	// finished is set when a finite source reached its end and its stream
	// was analysed to the last sample.
	finished atomic.Bool
	analysed atomic.Uint64 // samples handed to the pipeline
	lastErr  atomic.Pointer[string]

	// acks is nil while the pipeline is down; the ack handler then answers
	// "not running".
	ackMu sync.RWMutex
	acks  *ackLine

	dropEpisode bool            // touched by the source goroutine only
	foreignSeen map[string]bool // other stream ids seen; source goroutine only
	imp         impairment
	// activeIDs are the alarms raised and not cleared; touched by the
	// analysis goroutine only.
	activeIDs map[string]struct{}
}

func newStream(spec streamSpec, log zerolog.Logger, m *metrics, a alertSink, b bulletinSink) *stream {
	if spec.QueueLen <= 0 {
		spec.QueueLen = 1024
	}
	if spec.TickEvery <= 0 {
		spec.TickEvery = time.Second
	}
	if spec.Backoff.Min <= 0 {
		spec.Backoff = defaultBackoff
	}
	if spec.StatusEvery <= 0 {
		spec.StatusEvery = 5 * time.Second
	}
	s := &stream{spec: spec, log: log.With().Str("stream", spec.ID).Logger(), m: m, alerts: a, bull: b}
	m.streamUp.WithLabelValues(spec.ID).Set(0)
	m.sourceUp.WithLabelValues(spec.ID).Set(0)
	m.alertsActive.WithLabelValues(spec.ID).Set(0)
	return s
}

// Run supervises the stream until ctx is cancelled.
func (s *stream) Run(ctx context.Context) error {
	return supervise(ctx, s.log, s.spec.Backoff, s.runOnce,
		func(up bool) {
			s.up.Store(up)
			v := 0.0
			if up {
				v = 1
			}
			s.m.streamUp.WithLabelValues(s.spec.ID).Set(v)
		},
		func(err error, _ time.Duration) {
			msg := err.Error()
			s.lastErr.Store(&msg)
			s.restarts.Add(1)
			s.m.restarts.WithLabelValues(s.spec.ID).Inc()
		})
}

// ack hands an acknowledgement to the running pipeline and waits for its
// answer, at most until ctx ends.
func (s *stream) ack(ctx context.Context, id, by string) error {
	s.ackMu.RLock()
	line := s.acks
	s.ackMu.RUnlock()
	if err := alerts.CheckAck(s.spec.ID, id, by); err != nil {
		return err // refused here too: the browser view acknowledges through this path
	}
	notRunning := errNotRunning(s.spec.ID)
	if line == nil {
		return notRunning
	}
	req := ackRequest{ID: id, By: by, Reply: make(chan error, 1)}
	select {
	case line.ch <- req:
	case <-line.done:
		return notRunning
	case <-ctx.Done():
		return fmt.Errorf("ack %s: %w", id, ctx.Err())
	}
	select {
	case err := <-req.Reply:
		return err
	case <-ctx.Done():
		return fmt.Errorf("ack %s: %w", id, ctx.Err())
	}
}

// runOnce runs the stream's source and analysis until ctx is cancelled or
// either fails. The source goroutine is the only sender on the queue and
// closes it when it stops; the analysis goroutine drains the queue, flushes
// the pipeline and returns. That gives the shutdown order inside a stream:
// the source stops first, then analysis finishes what was read.
func (s *stream) runOnce(ctx context.Context) error {
	err := s.runSource(ctx)
	if errors.Is(err, errFinished) {
		s.finished.Store(true)
	}
	return err
}

// runSource is one run of the stream's source and analysis.
func (s *stream) runSource(ctx context.Context) error {
	s.endLeftAlarms(ctx)
	src, pl, err := s.spec.Open()
	if err != nil {
		return fmt.Errorf("open: %w", err)
	}
	s.m.addSource(s.spec.ID, src.Stats)
	// The new pipeline starts with no alarm raised.
	s.activeIDs = map[string]struct{}{}
	s.active.Store(0)
	s.m.alertsActive.WithLabelValues(s.spec.ID).Set(0)

	queue := make(chan ingest.Event, s.spec.QueueLen)
	acks := make(chan ackRequest)
	analysisDone := make(chan struct{})
	s.ackMu.Lock()
	s.acks = &ackLine{ch: acks, done: analysisDone}
	s.ackMu.Unlock()
	defer func() {
		s.ackMu.Lock()
		s.acks = nil
		s.ackMu.Unlock()
		s.connected.Store(false)
		s.m.sourceUp.WithLabelValues(s.spec.ID).Set(0)
	}()

	// srcCtx stops the source on shutdown or when analysis fails;
	// analysis itself ends when the queue is closed.
	srcCtx, stopSource := context.WithCancel(ctx)
	defer stopSource()

	g := new(errgroup.Group)
	g.Go(func() error {
		defer close(queue)
		err := protect(srcCtx, func(c context.Context) error {
			return src.Run(c, func(ev ingest.Event) { s.enqueue(queue, analysisDone, ev) })
		})
		if err != nil && srcCtx.Err() == nil {
			return fmt.Errorf("source: %w", err)
		}
		if err == nil && srcCtx.Err() == nil {
			if s.spec.Finite {
				return errFinished
			}
			return errors.New("source ended")
		}
		return nil
	})
	g.Go(func() error {
		defer close(analysisDone)
		err := protect(ctx, func(context.Context) error { return s.analyse(ctx, pl, queue, acks) })
		if err != nil {
			stopSource()
			return fmt.Errorf("analysis: %w", err)
		}
		return nil
	})
	return g.Wait()
}

// enqueue copies the event (its samples are only valid during the call) and
// queues it. The stream follows its source's overload policy: behind a
// source that blocks (a file, stdin: nothing dropped) it waits for the
// analysis; behind a live source it does not wait, and a full queue means
// the analysis fell behind: the batch is dropped and counted, with one
// warning per episode. Status events are never dropped.
func (s *stream) enqueue(queue chan<- ingest.Event, analysisDone <-chan struct{}, ev ingest.Event) {
	if ev.Status == ingest.StatusConnected {
		s.connected.Store(true)
		s.m.sourceUp.WithLabelValues(s.spec.ID).Set(1)
	} else if ev.Status == ingest.StatusDisconnected {
		s.connected.Store(false)
		s.m.sourceUp.WithLabelValues(s.spec.ID).Set(0)
	}
	if !s.acceptsStream(&ev) {
		return
	}
	if len(ev.Samples) > 0 {
		// A source that delivers samples is reading, whether or not it
		// announced it.
		if !s.connected.Load() {
			s.connected.Store(true)
			s.m.sourceUp.WithLabelValues(s.spec.ID).Set(1)
		}
		ev.Samples = append([]ingest.Sample(nil), ev.Samples...)
	}
	if ev.Status != ingest.StatusNone || s.spec.Overload == ingest.OverloadBlock {
		select {
		case queue <- ev:
		case <-analysisDone:
		}
		return
	}
	select {
	case queue <- ev:
		if s.dropEpisode {
			s.dropEpisode = false
			s.log.Info().Msg("analysis caught up; no longer dropping samples")
		}
	case <-analysisDone:
	default:
		s.m.queueDropped.WithLabelValues(s.spec.ID).Add(float64(len(ev.Samples)))
		if !s.dropEpisode {
			s.dropEpisode = true
			s.log.Warn().Int("queue", cap(queue)).Msg("analysis is behind its source; dropping samples")
		}
	}
}

// analyse is the stream's analysis loop: it owns the pipeline.
func (s *stream) analyse(ctx context.Context, pl streamPipeline, queue <-chan ingest.Event, acks <-chan ackRequest) error {
	tick := time.NewTicker(s.spec.TickEvery)
	defer tick.Stop()
	var lastStatus time.Time
	// pubCtx outlives ctx: alerts found while draining the queue at
	// shutdown are still written to the spool.
	pubCtx := context.WithoutCancel(ctx)
	if err := s.resume(pubCtx, pl); err != nil {
		return err
	}
	for {
		select {
		case ev, ok := <-queue:
			if !ok {
				return s.drained(pubCtx, ctx, pl)
			}
			arrived := time.Now()
			if ev.Status != ingest.StatusNone {
				if s.view != nil {
					s.view.Status(s.spec.ID, ev.Status)
				}
				out := pl.Status(ev, arrived)
				s.keepAlarms(pl, arrived, out)
				if err := s.emit(pubCtx, out, time.Time{}); err != nil {
					return err
				}
			}
			if len(ev.Samples) > 0 {
				out := pl.Samples(ev.Samples)
				// Before the breaths go out (their numbers are reserved)
				// and before the alarm events (see keepAlarms).
				if !s.keepAlarms(pl, arrived, out) {
					s.checkpoint(pl, arrived, false)
				}
				if err := s.emit(pubCtx, out, arrived); err != nil {
					return err
				}
				s.analysed.Add(uint64(len(ev.Samples)))
				if s.view != nil {
					s.view.Samples(s.spec.ID, ev.Samples)
				}
			}
		case now := <-tick.C:
			out := pl.Tick(now)
			s.keepAlarms(pl, now, out)
			if err := s.emit(pubCtx, out, time.Time{}); err != nil {
				return err
			}
			if s.spec.Health != nil {
				out := pl.Finding(s.spec.Health(), now)
				s.keepAlarms(pl, now, out)
				if err := s.emit(pubCtx, out, time.Time{}); err != nil {
					return err
				}
			}
			s.checkpoint(pl, now, false)
			s.checkDelivery(pubCtx, now)
			if now.Sub(lastStatus) >= s.spec.StatusEvery {
				lastStatus = now
				s.heartbeat(now)
			}
		case req := <-acks:
			now := time.Now()
			out, err := pl.Ack(req.ID, req.By, now)
			if err != nil {
				req.Reply <- err
				continue
			}
			s.keepAlarms(pl, now, out)
			err = s.emit(pubCtx, out, time.Time{})
			req.Reply <- err
			if err != nil {
				return err
			}
		}
	}
}

// drained ends the analysis once the queue is closed and empty: what the
// pipeline holds goes out, the alarms of a stream that keeps no checkpoint
// end at a shutdown (endUnresumable), and the last checkpoint is written.
func (s *stream) drained(pubCtx, ctx context.Context, pl streamPipeline) error {
	err := s.emit(pubCtx, pl.Flush(), time.Time{})
	s.endUnresumable(pubCtx, ctx, pl)
	s.recovered(pubCtx, time.Now(), alerts.Ended, "stream stopped")
	s.checkpoint(pl, time.Now(), true)
	return err
}

// emit delivers what a step produced: alerts through the durable publisher
// (a refusal degrades delivery but never stops the stream: see deliver),
// breaths through the non-blocking bulletin.
func (s *stream) emit(ctx context.Context, out stageOutput, arrived time.Time) error {
	for i := range out.Alerts {
		ev := out.Alerts[i]
		s.deliverKept(ctx, ev)
		s.m.alerts.WithLabelValues(s.spec.ID, ev.Condition, string(ev.State)).Inc()
		if s.view != nil {
			s.view.Alert(ev)
		}
		if ev.Supersedes != "" {
			delete(s.activeIDs, ev.Supersedes)
		}
		if ev.State.Terminal() {
			delete(s.activeIDs, ev.ID)
		} else {
			s.activeIDs[ev.ID] = struct{}{}
		}
		s.active.Store(int64(len(s.activeIDs)))
		s.m.alertsActive.WithLabelValues(s.spec.ID).Set(float64(len(s.activeIDs)))
	}
	for i := range out.Breaths {
		b := &out.Breaths[i]
		if b.Stream == "" {
			b.Stream = s.spec.ID
		}
		s.bull.Breath(b)
		if s.view != nil {
			s.view.Breath(*b)
		}
		s.breaths.Add(1)
		s.m.breaths.WithLabelValues(s.spec.ID).Inc()
		if !arrived.IsZero() {
			s.m.breathLatency.Observe(time.Since(arrived).Seconds())
		}
	}
	return nil
}

// heartbeat publishes the stream's status message.
func (s *stream) heartbeat(now time.Time) {
	publishStatus(s.bull, s.spec.ID, now, s.up.Load(), s.connected.Load(), s.breaths.Load(), s.active.Load(), s.restarts.Load())
}

// publishStatus publishes the status message of one stream.
func publishStatus(bull bulletinSink, id string, now time.Time, running, connected bool, breaths uint64, active int64, restarts uint64) {
	st := bus.StreamStatus{
		Type: "status", Schema: 1, Stream: id, Time: now.UTC(),
		Running: running, Connected: connected, Breaths: breaths, Active: active, Restarts: restarts,
	}
	b, err := st.Marshal()
	if err != nil {
		return
	}
	bull.Status(id, b)
}

// errNotRunning answers an acknowledgement for a stream without a pipeline.
func errNotRunning(id string) error { return fmt.Errorf("stream %s is not running", id) }
