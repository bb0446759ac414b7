package scaleout

import (
	"context"
	"fmt"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
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
// them for the workers. It analyses nothing.
type edge struct {
	cfg   *config.Config
	log   zerolog.Logger
	names scaleNames
	js    jetstream.JetStream

	sent   atomic.Uint64 // messages handed to JetStream
	failed atomic.Uint64 // messages that could not be sent or were refused
}

// edgeMaxPending bounds the sample messages in flight without a JetStream
// acknowledgement. Throughput is at most this many per acknowledgement
// round trip: with 1000 streams at 20 messages/s each and round trips of up
// to a second on a loaded replicated stream, 4096 was too few.
const edgeMaxPending = 65536

// RunEdge runs the edge role until ctx is cancelled.
func RunEdge(ctx context.Context, h Host) error {
	cfg := h.Config
	b, err := bus.Open(cfg, h.Log)
	if err != nil {
		return err
	}
	defer b.Close()
	e := &edge{cfg: cfg, log: h.Log.With().Str("role", "edge").Logger(), names: newScaleNames(cfg.NATS.SubjectPrefix)}
	js, err := jetstream.New(b.Conn, jetstream.WithPublishAsyncMaxPending(edgeMaxPending),
		jetstream.WithPublishAsyncErrHandler(func(_ jetstream.JetStream, m *nats.Msg, err error) {
			if e.failed.Add(1) == 1 {
				e.log.Warn().Err(err).Str("subject", m.Subject).Msg("samples not stored by JetStream (warned once)")
			}
		}))
	if err != nil {
		return fmt.Errorf("jetstream: %w", err)
	}
	e.js = js
	if err := ensureSamplesStream(ctx, js, e.names, &cfg.ScaleOut, scaleReplicas(b.Conn, &cfg.ScaleOut), e.log); err != nil {
		return fmt.Errorf("samples stream: %w", err)
	}
	g, gctx := errgroup.WithContext(ctx)
	if err := h.StartHTTP(gctx, g, b.Conn, func() uint64 { return 0 }); err != nil {
		return err
	}
	for _, sc := range cfg.Streams {
		log := e.log.With().Str("stream", sc.ID).Logger()
		opts := ingest.Options{Stream: sc.ID, Columns: sc.Columns, RateHz: sc.SampleRateHz, Log: &log, NATS: b.Conn}
		if _, err := ingest.Open(sc.Source, opts); err != nil {
			return h.Usage(fmt.Errorf("stream %s: source %s: %w", sc.ID, sc.Source, err))
		}
		g.Go(func() error {
			return h.Supervise(gctx, log, func(ctx context.Context) error {
				src, err := ingest.Open(sc.Source, opts)
				if err != nil {
					return err
				}
				h.AddSource(sc.ID, src.Stats)
				if err := e.runSource(ctx, src); err != nil || ctx.Err() != nil {
					return err
				}
				// A recording that has ended is not read again.
				log.Info().Msg("source ended; its samples are sent")
				<-ctx.Done()
				return nil
			})
		})
	}
	e.log.Info().Int("streams", len(cfg.Streams)).Str("nats", b.URL).Dur("batch", cfg.ScaleOut.Batch).Msg("trapline edge running")
	if h.Ready != nil {
		h.Ready(b)
	}
	err = g.Wait()
	// Wait (bounded) for the acknowledgements of what was sent.
	select {
	case <-js.PublishAsyncComplete():
	case <-time.After(cfg.ShutdownTimeout):
	}
	e.log.Info().Uint64("sent", e.sent.Load()).Uint64("failed", e.failed.Load()).Msg("trapline edge stopped")
	return err
}

// runSource reads one source and publishes its samples in batches: a batch
// goes out once it spans scaleout.batch of sample time, or once its first
// sample has waited that long in wall time (a slow or paused source).
func (e *edge) runSource(ctx context.Context, src ingest.Source) error {
	bt, err := e.newBatcher()
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
	enc    *ingest.BinaryEncoder
	batchS float64
	mu     sync.Mutex
	buf    map[string]*pendingBatch
	out    []byte
}

func (e *edge) newBatcher() (*batcher, error) {
	enc, err := ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{Time: true, Volume: true})
	if err != nil {
		return nil, err
	}
	return &batcher{e: e, enc: enc, batchS: e.cfg.ScaleOut.Batch.Seconds(), buf: map[string]*pendingBatch{}}, nil
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

// flush publishes one stream's batch; the caller holds mu.
func (bt *batcher) flush(stream string, p *pendingBatch) {
	bt.out = bt.enc.AppendFrame(bt.out[:0], stream, p.samples)
	msg := append([]byte(nil), bt.out...)
	p.samples = p.samples[:0]
	if _, err := bt.e.js.PublishMsgAsync(&nats.Msg{Subject: bt.e.names.subj().Samples(stream), Data: msg}); err != nil {
		bt.e.failed.Add(1)
		return
	}
	bt.e.sent.Add(1)
}
