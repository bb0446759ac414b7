package daemon

import (
	"context"
	"errors"
	"fmt"
	"hash/maphash"
	"runtime"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/rs/zerolog"
	"golang.org/x/sync/errgroup"

	"trapline/alerts"
	"trapline/config"
	"trapline/ingest"
	"trapline/ingest/backoff"
)

// The runtime of multiplexed sources (config sources:) has no goroutine per
// stream. A source decodes on its reading goroutines (one per connection of
// a tcp-listen source, one otherwise) and routes the events of each read
// straight to a fixed pool of shards, one goroutine per GOMAXPROCS; a
// stream belongs to the shard its id hashes to, which owns its pipeline
// and is the only goroutine that touches it. Samples travel in the
// source's pooled buffers (ingest.Options.Direct), grouped by shard: one
// channel send per shard per read, not per stream. The shard also runs the
// streams' ticks (signal lost), heartbeats and acknowledgements, so a
// stream that goes quiet costs no goroutine and no wake-up of its own.
//
// Memory per stream is bounded: its pipeline (the analyzer's breath buffer
// and the detectors' windows, about 40 KiB, see docs/sources.md) plus the
// samples in flight, which are bounded per shard by shardQueue reads (2048)
// and by maxQueuedSamples samples (32 MiB), whichever comes first.

// shardQueue is the number of reads (work batches) a shard's queue holds.
const shardQueue = 2048

// maxShards caps the pool; beyond it a goroutine per core buys nothing.
const maxShards = 64

// muxRuntime is the shard pool and the registry of every stream of every
// multiplexed source of the daemon.
type muxRuntime struct {
	d       *Daemon
	shards  []*shard
	seed    maphash.Seed
	sources []*muxSource

	mu      sync.RWMutex
	byToken map[string]*muxStream // ack subject token → stream
}

func newMuxRuntime(d *Daemon) *muxRuntime {
	n := min(max(runtime.GOMAXPROCS(0), 1), maxShards)
	r := &muxRuntime{d: d, seed: maphash.MakeSeed(), byToken: map[string]*muxStream{}}
	for i := range n {
		r.shards = append(r.shards, newShard(r, i))
	}
	return r
}

// shardOf returns the shard that owns stream id.
func (r *muxRuntime) shardOf(id string) *shard {
	return r.shards[maphash.String(r.seed, id)%uint64(len(r.shards))]
}

// muxSource is one configured multiplexed source and its admitted streams.
type muxSource struct {
	r        *muxRuntime
	cfg      config.Source
	settings config.SourceSettings
	digest   string // of settings, shared by the source's pipelines
	src      ingest.Source
	adm      *ingest.Admission
	finite   bool
	block    bool // wait for the shards rather than drop (file, stdin)
	log      zerolog.Logger
	ctx      context.Context // set by run: ends the waits of a blocking send

	mu      sync.RWMutex
	streams map[string]*muxStream

	refused     prometheus.Counter
	dropped     prometheus.Counter
	dropEpisode atomic.Bool
	lastWarn    atomic.Int64 // unix ns of the last warning about drops
	finished    atomic.Bool
}

// addSource opens configured source i; the source reads once Run starts.
func (r *muxRuntime) addSource(i int) (*muxSource, error) {
	d := r.d
	sc := d.cfg.Sources[i]
	key := fmt.Sprintf("sources[%d] (%s)", i, sc.Name)
	st, err := d.cfg.Settings(i)
	if err != nil {
		return nil, &UsageError{Err: err}
	}
	adm, err := ingest.NewAdmission(sc.Admission())
	if err != nil {
		return nil, &UsageError{Err: fmt.Errorf("%s: %w", key, err)}
	}
	u, err := ingest.ParseURL(sc.URL)
	if err != nil {
		return nil, &UsageError{Err: fmt.Errorf("%s: source %s: %w", key, sc.URL, err)}
	}
	ms := &muxSource{
		r: r, cfg: sc, settings: st, adm: adm,
		digest:  config.AnalysisDigest(st.Analysis, st.Detectors, st.Alarms),
		finite:  u.Scheme == "file" || u.Scheme == "stdin",
		log:     d.log.With().Str("source", sc.Name).Logger(),
		streams: map[string]*muxStream{},
		refused: d.m.refused.WithLabelValues(sc.Name),
		dropped: d.m.queueDropped.WithLabelValues(sc.Name),
	}
	opts := ingest.Options{
		Columns: sc.Columns, RateHz: sc.SampleRateHz, Log: &ms.log, NATS: d.nc, Direct: ms.deliver,
		Hold: sc.BatchWindow,
	}
	ms.block = opts.Overload.For(u.Scheme) == ingest.OverloadBlock
	if ms.src, err = ingest.Open(sc.URL, opts); err != nil {
		return nil, &UsageError{Err: fmt.Errorf("%s: source %s: %w", key, sc.URL, err)}
	}
	d.m.addSource("source:"+sc.Name, ms.src.Stats)
	d.m.muxStreams.WithLabelValues(sc.Name).Set(0)
	r.sources = append(r.sources, ms)
	return ms, nil
}

// stream returns the stream of id, admitting it on its first event, or nil
// when the source refuses it. It is called from the reading goroutines.
func (ms *muxSource) stream(id string) *muxStream {
	ms.mu.RLock()
	st, ok := ms.streams[id]
	ms.mu.RUnlock()
	if ok {
		return st
	}
	if _, err := ms.adm.Admit(id); err != nil {
		return nil
	}
	ms.mu.Lock()
	defer ms.mu.Unlock()
	if st, ok := ms.streams[id]; ok {
		return st
	}
	st = newMuxStream(ms, id)
	ms.streams[id] = st
	ms.r.d.m.muxStreams.WithLabelValues(ms.cfg.Name).Set(float64(len(ms.streams)))
	ms.r.mu.Lock()
	ms.r.byToken[alerts.SubjectToken(id)] = st
	ms.r.mu.Unlock()
	ms.log.Info().Str("stream", id).Msg("stream admitted")
	return st
}

// slotValue is what s holds, nil for no slot.
func slotValue(s *ingest.StreamSlot) any {
	if s == nil {
		return nil
	}
	return s.V
}

// deliver is the source's direct sink: it routes the events of one read to
// the shards of their streams, one work batch per shard.
func (ms *muxSource) deliver(evs []ingest.Event) {
	var parts [maxShards]*work
	arrived := time.Now()
	refused := 0
	for i := range evs {
		// The stream's slot on its connection remembers it: a lookup by
		// id only on its first event there (streams are never removed).
		st, _ := slotValue(evs[i].Slot).(*muxStream)
		if st == nil {
			if st = ms.stream(evs[i].Stream); st != nil && evs[i].Slot != nil {
				evs[i].Slot.V = st
			}
		}
		if st == nil {
			refused += len(evs[i].Samples)
			evs[i].Release()
			continue
		}
		w := parts[st.shard.idx]
		if w == nil {
			w = getWork(arrived)
			parts[st.shard.idx] = w
		}
		w.items = append(w.items, workItem{st: st, ev: evs[i]})
		w.samples += len(evs[i].Samples)
	}
	if refused > 0 {
		ms.refused.Add(float64(refused))
	}
	for i, w := range parts[:len(ms.r.shards)] {
		if w != nil {
			ms.send(ms.r.shards[i], w)
		}
	}
}

// send queues a work batch on a shard: behind a source that blocks (a
// file, stdin) it waits; behind a live one a full queue (by reads or by
// samples, see maxQueuedSamples) means the shard is behind, and the read
// waits up to liveWait for room (meanwhile the sender's data waits in the
// connection's socket buffers), then the batch is dropped and counted with
// one warning per episode.
func (ms *muxSource) send(sh *shard, w *work) {
	if ms.block {
		sh.count(w)
		select {
		case sh.in <- w:
		case <-ms.ctx.Done():
			w.release()
		}
		return
	}
	if sh.reserve(w) {
		select {
		case sh.in <- w:
			if ms.dropEpisode.Load() && ms.dropEpisode.CompareAndSwap(true, false) {
				ms.log.Debug().Msg("analysis caught up; no longer dropping samples")
			}
			return
		default:
		}
	}
	if ms.waitRoom(sh, w) {
		return
	}
	ms.dropped.Add(float64(w.samples))
	// One warning per episode, and episodes that come and go within ten
	// seconds count as one.
	now := time.Now().UnixNano()
	if ms.dropEpisode.CompareAndSwap(false, true) && now-ms.lastWarn.Load() >= int64(10*time.Second) {
		ms.lastWarn.Store(now)
		ms.log.Warn().Int("queue", cap(sh.in)).Int64("queued_samples", sh.queued.Load()).
			Msg("analysis is behind its source; dropping samples")
	}
	w.release()
}

// liveWait is how long a read of a live source waits for room in a full
// shard queue before its samples are dropped: long enough to ride out a
// burst (thousands of pipelines made at once when a ward connects, a
// collection), short enough that a shard that cannot keep up sheds load
// instead of holding its links.
const liveWait = time.Second

// waitRoom waits up to liveWait for room for w in sh's queue, looking
// again every few milliseconds while the queue is full by samples.
func (ms *muxSource) waitRoom(sh *shard, w *work) bool {
	deadline := time.Now().Add(liveWait)
	for w.sh == nil && !sh.reserve(w) {
		if time.Now().After(deadline) || !backoff.Sleep(ms.ctx, nil, 2*time.Millisecond) {
			return false
		}
	}
	t := time.NewTimer(time.Until(deadline))
	defer t.Stop()
	select {
	case sh.in <- w:
		return true
	case <-t.C:
	case <-ms.ctx.Done():
	}
	return false
}

// run reads the source until ctx ends, restarting it with backoff when it
// fails. A finite source that reached its end finishes its streams.
func (ms *muxSource) run(ctx context.Context) error {
	ms.ctx = ctx
	err := supervise(ctx, ms.log, defaultBackoff, func(c context.Context) error {
		err := ms.src.Run(c, nil)
		if err != nil {
			return err
		}
		if c.Err() == nil && ms.finite {
			return errFinished
		}
		return nil
	}, nil, nil)
	if ms.finite && ctx.Err() == nil {
		ms.finished.Store(true)
		for _, sh := range ms.r.shards {
			w := getWork(time.Now())
			w.finished = ms
			sh.in <- w
		}
	}
	return err
}

// ready reports the readiness of the source: it has been started.
func (ms *muxSource) ready() error { return nil }

// run runs every multiplexed source and the shards until ctx ends. The
// shards outlive the sources: once every source has stopped they drain
// what was read, finish their streams and return.
func (r *muxRuntime) run(ctx context.Context) error {
	if len(r.sources) == 0 {
		return nil
	}
	shardCtx, stopShards := context.WithCancel(context.WithoutCancel(ctx))
	defer stopShards()
	sg := new(errgroup.Group)
	for _, sh := range r.shards {
		sg.Go(func() error { return sh.run(shardCtx, ctx) })
	}
	g := new(errgroup.Group)
	for _, ms := range r.sources {
		g.Go(func() error { return ms.run(ctx) })
	}
	err := g.Wait()
	stopShards()
	return errors.Join(err, sg.Wait())
}

// ack hands an acknowledgement to the shard of the stream with token tok.
func (r *muxRuntime) ack(ctx context.Context, tok, id, by string) (string, error) {
	r.mu.RLock()
	st := r.byToken[tok]
	r.mu.RUnlock()
	if st == nil {
		return "", fmt.Errorf("no stream with token %s", tok)
	}
	req := muxAck{st: st, id: id, by: by, reply: make(chan error, 1)}
	select {
	case st.shard.acks <- req:
	case <-st.shard.done:
		return st.id, fmt.Errorf("stream %s is not running", st.id)
	case <-ctx.Done():
		return st.id, fmt.Errorf("ack %s: %w", id, ctx.Err())
	}
	select {
	case err := <-req.reply:
		return st.id, err
	case <-ctx.Done():
		return st.id, fmt.Errorf("ack %s: %w", id, ctx.Err())
	}
}

// has reports whether a multiplexed stream with token tok exists.
func (r *muxRuntime) has(tok string) bool {
	r.mu.RLock()
	defer r.mu.RUnlock()
	return r.byToken[tok] != nil
}

// pending returns the number of work batches waiting in the shards' queues.
func (r *muxRuntime) pending() int {
	n := 0
	for _, sh := range r.shards {
		n += len(sh.in)
	}
	return n
}
