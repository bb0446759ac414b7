package scaleout

import (
	"context"
	"fmt"
	"sync"
	"time"

	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"
	"golang.org/x/sync/errgroup"

	"trapline/config"
	"trapline/daemon/bus"
	"trapline/ingest"
)

// edge is the edge role: it reads the configured streams and publishes their
// samples, in batches of scaleout.batch, in the binary framing to
// <prefix>.samples.<stream>, where the samples stream of the cluster keeps
// them for the workers. It analyses nothing and keeps no state on disk:
// its outbox holds what JetStream has not acknowledged yet.
type edge struct {
	cfg   *config.Config
	log   zerolog.Logger
	names scaleNames
	out   *outbox
}

// edgeMaxPending bounds the publishes awaiting acknowledgement; the
// outbox keeps one per stream in flight, so this is a bound on streams.
const edgeMaxPending = 1 << 14

// edgeSourceBuffer is the events (batches of up to 256 samples, 8 KiB
// each) a source may hold between its reader and the edge: the edge's
// outbox, bounded in bytes, is where samples wait.
const edgeSourceBuffer = 8

// RunEdge runs the edge role until ctx is cancelled.
func RunEdge(ctx context.Context, h Host) error {
	cfg := h.Config
	b, err := bus.Open(cfg, h.Log)
	if err != nil {
		return err
	}
	defer b.Close()
	so := &cfg.ScaleOut
	e := &edge{cfg: cfg, log: h.Log.With().Str("role", "edge").Logger(), names: newScaleNames(cfg.NATS.SubjectPrefix)}
	e.out = newOutbox(int64(so.EdgeBuffer), samplesDedupe(so)-cfg.NATS.PublishTimeout, e.log)
	js, err := jetstream.New(b.Conn, jetstream.WithPublishAsyncMaxPending(edgeMaxPending),
		jetstream.WithPublishAsyncTimeout(cfg.NATS.PublishTimeout))
	if err != nil {
		return fmt.Errorf("jetstream: %w", err)
	}
	if err := ensureSamplesStream(ctx, js, e.names, so, scaleReplicas(b.Conn, so), e.log); err != nil {
		return fmt.Errorf("samples stream: %w", err)
	}
	if h.Register != nil {
		h.Register(e.out.collector())
	}
	sendCtx, stopSend := context.WithCancel(context.WithoutCancel(ctx))
	defer stopSend()
	sendDone := make(chan struct{})
	go func() { defer close(sendDone); e.out.run(sendCtx, js) }()
	g, gctx := errgroup.WithContext(ctx)
	if err := h.StartHTTP(gctx, g, b.Conn, func() uint64 { return 0 }); err != nil {
		return err
	}
	for _, sc := range cfg.Streams {
		if err := e.startStream(gctx, g, h, b, sc); err != nil {
			return err
		}
	}
	e.log.Info().Int("streams", len(cfg.Streams)).Str("nats", b.URL).Dur("batch", so.Batch).
		Int64("buffer_bytes", int64(so.EdgeBuffer)).Msg("trapline edge running")
	if h.Ready != nil {
		h.Ready(b)
	}
	err = g.Wait()
	// Wait (bounded) for the acknowledgements of what was sent.
	dctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), cfg.ShutdownTimeout)
	drained := e.out.drain(dctx)
	cancel()
	stopSend()
	<-sendDone
	ev := e.log.Info()
	if !drained {
		ev = e.log.Error().Int64("pending_bytes", e.out.pendingBytes())
	}
	ev.Uint64("sent", e.out.sent.Load()).Uint64("acknowledged", e.out.acked.Load()).Uint64("retried", e.out.retried.Load()).
		Uint64("failed", e.out.failed.Load()).Uint64("dropped", e.out.dropped.Load()).Msg("trapline edge stopped")
	return err
}

// startStream checks one configured stream's source and reads it in g,
// restarted after failures.
func (e *edge) startStream(ctx context.Context, g *errgroup.Group, h Host, b *bus.Bus, sc config.Stream) error {
	log := e.log.With().Str("stream", sc.ID).Logger()
	opts := ingest.Options{Stream: sc.ID, Columns: sc.Columns, RateHz: sc.SampleRateHz, Log: &log, NATS: b.Conn,
		Buffer: edgeSourceBuffer}
	spec, err := ingest.ParseURL(sc.Source)
	if err != nil {
		return h.Usage(fmt.Errorf("stream %s: source %s: %w", sc.ID, sc.Source, err))
	}
	// A reader that can wait is made to wait when the outbox is full; a
	// serial line, a datagram socket or a subscription cannot be slowed, so
	// there the outbox drops and counts.
	block := slowable(spec.Scheme)
	if block {
		opts.Overload = ingest.OverloadBlock
	}
	if _, err := ingest.Open(sc.Source, opts); err != nil {
		return h.Usage(fmt.Errorf("stream %s: source %s: %w", sc.ID, sc.Source, err))
	}
	g.Go(func() error {
		return h.Supervise(ctx, log, func(ctx context.Context) error {
			src, err := ingest.Open(sc.Source, opts)
			if err != nil {
				return err
			}
			h.AddSource(sc.ID, src.Stats)
			if err := e.runSource(ctx, src, block); err != nil || ctx.Err() != nil {
				return err
			}
			// A recording that has ended is not read again.
			log.Info().Msg("source ended; its samples are queued for the cluster")
			<-ctx.Done()
			return nil
		})
	})
	return nil
}

// slowable tells whether a source of the scheme can be made to wait.
func slowable(scheme string) bool {
	switch scheme {
	case "file", "stdin", "tcp", "tcp-listen":
		return true
	}
	return false
}

// runSource reads one source and publishes its samples in batches: a batch
// goes out once it spans scaleout.batch of sample time, or once its first
// sample has waited that long in wall time (a slow or paused source).
func (e *edge) runSource(ctx context.Context, src ingest.Source, block bool) error {
	bt, err := e.newBatcher(ctx, block)
	if err != nil {
		return err
	}
	done := make(chan struct{})
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		t := time.NewTicker(e.cfg.ScaleOut.Batch / 2)
		defer t.Stop()
		for {
			select {
			case <-done:
				return
			case now := <-t.C:
				bt.flushDue(now)
			}
		}
	}()
	err = src.Run(ctx, bt.add)
	close(done)
	wg.Wait()
	bt.flushDue(time.Time{})
	return err
}

// pendingBatch is the samples of one stream waiting to be published.
type pendingBatch struct {
	samples []ingest.Sample
	since   time.Time
}

// batcher gathers a source's samples per stream into batches of
// scaleout.batch of stream time, each published as one binary frame.
type batcher struct {
	e      *edge
	ctx    context.Context
	block  bool
	enc    *ingest.BinaryEncoder
	batchS float64
	mu     sync.Mutex
	buf    map[string]*pendingBatch
	out    []byte
}

func (e *edge) newBatcher(ctx context.Context, block bool) (*batcher, error) {
	enc, err := ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{Time: true, Volume: true})
	if err != nil {
		return nil, err
	}
	return &batcher{e: e, ctx: ctx, block: block, enc: enc, batchS: e.cfg.ScaleOut.Batch.Seconds(), buf: map[string]*pendingBatch{}}, nil
}

// add is the source's sink.
func (bt *batcher) add(ev ingest.Event) {
	if len(ev.Samples) == 0 || !ingest.ValidStreamID(ev.Stream) {
		return
	}
	bt.mu.Lock()
	defer bt.mu.Unlock()
	p := bt.buf[ev.Stream]
	if p == nil {
		p = &pendingBatch{}
		bt.buf[ev.Stream] = p
	}
	for _, s := range ev.Samples {
		// A sample batchS or more after the first starts the next batch,
		// so that a batch holds batchS of samples (5 at 100 Hz and 50 ms).
		if len(p.samples) > 0 && s.TimeS-p.samples[0].TimeS >= bt.batchS-1e-9 {
			bt.flush(ev.Stream, p)
		}
		if len(p.samples) == 0 {
			p.since = time.Now()
		}
		p.samples = append(p.samples, s)
	}
}

// flushDue publishes the batches that waited scaleout.batch of wall time
// by now; a zero now publishes every batch (the source has ended).
func (bt *batcher) flushDue(now time.Time) {
	bt.mu.Lock()
	defer bt.mu.Unlock()
	for stream, p := range bt.buf {
		if len(p.samples) > 0 && (now.IsZero() || now.Sub(p.since) >= bt.e.cfg.ScaleOut.Batch) {
			bt.flush(stream, p)
		}
	}
}

// flush hands one stream's batch to the outbox; the caller holds mu. A
// full outbox blocks a slowable source here, inside its sink.
func (bt *batcher) flush(stream string, p *pendingBatch) {
	bt.out = bt.enc.AppendFrame(bt.out[:0], stream, p.samples)
	p.samples = p.samples[:0]
	bt.e.out.put(bt.ctx, stream, bt.e.names.subj().Samples(stream), bt.out, bt.block)
}
