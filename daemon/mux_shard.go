package daemon

import (
	"context"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/analyze"
	"trapline/ingest"
)

// workItem is one event of one stream, its samples still in the source's
// pooled buffer.
type workItem struct {
	st *muxStream
	ev ingest.Event
}

// work is what one read of a source brings to one shard.
type work struct {
	items   []workItem
	samples int       // in items
	sh      *shard    // whose queued count holds samples, once reserved
	arrived time.Time // when the read was decoded
	// finished, when set, says that this finite source reached its end.
	finished *muxSource
}

var workPool = sync.Pool{New: func() any { return &work{items: make([]workItem, 0, 64)} }}

func getWork(arrived time.Time) *work {
	w := workPool.Get().(*work)
	w.arrived = arrived
	return w
}

// release returns the samples and the batch to their pools.
func (w *work) release() {
	for i := range w.items {
		w.items[i].ev.Release()
	}
	if w.sh != nil {
		w.sh.queued.Add(-int64(w.samples))
	}
	clear(w.items)
	w.items, w.finished, w.sh, w.samples = w.items[:0], nil, nil, 0
	workPool.Put(w)
}

// maxQueuedSamples bounds the samples waiting in one shard's queue (32 MiB
// of samples): a read of a held link can carry a thousand times more than
// one of a link read as it comes, so the queue's bound in reads alone would
// not bound its memory.
const maxQueuedSamples = 1 << 20

// reserve counts w's samples as queued on sh if they fit under
// maxQueuedSamples (a batch larger than the bound fits an empty queue).
func (sh *shard) reserve(w *work) bool {
	n := int64(w.samples)
	if q := sh.queued.Add(n); q > maxQueuedSamples && q != n {
		sh.queued.Add(-n)
		return false
	}
	w.sh = sh
	return true
}

// count counts w's samples as queued on sh whatever the bound: a blocking
// source waits on the queue itself instead.
func (sh *shard) count(w *work) {
	sh.queued.Add(int64(w.samples))
	w.sh = sh
}

// muxAck is an acknowledgement on its way to the owning shard.
type muxAck struct {
	st     *muxStream
	id, by string
	reply  chan error
}

// muxStream is one admitted stream of a multiplexed source. Its pipeline
// and alarm set belong to its shard's goroutine; the atomics are read by
// heartbeats and metrics.
type muxStream struct {
	id    string
	src   *muxSource
	shard *shard

	pl        *pipeline.Pipeline // nil until the shard sees the stream
	queued    []queuedItem       // its events of the reads a shard takes at once
	activeIDs map[string]struct{}
	done      bool // its finite source ended

	connected atomic.Bool
	breaths   atomic.Uint64
	active    atomic.Int64

	breathsC prometheus.Counter
}

func newMuxStream(ms *muxSource, id string) *muxStream {
	return &muxStream{
		id: id, src: ms, shard: ms.r.shardOf(id),
		breathsC: ms.r.d.m.breaths.WithLabelValues(id),
	}
}

// shard is one goroutine of the pool and the streams it owns.
type shard struct {
	r    *muxRuntime
	idx  int
	in   chan *work
	acks chan muxAck
	done chan struct{}
	log  zerolog.Logger
	// queued counts the samples of the reads in the queue and in hand,
	// until they are released.
	queued atomic.Int64

	streams []*muxStream    // in order of first event
	taken   []*work         // reads taken at once (see take)
	joined  []ingest.Sample // one stream's samples of the reads taken at once
	touched []*muxStream    // streams with queued events
	cur     *muxStream      // the stream whose pipeline is running (pipeline.Sink)
	arrived time.Time
	// alerts go to the shard's publisher goroutine, so that making one
	// durable (a write and fsync of the spool) does not hold up the
	// analysis of the shard's other streams; a full queue waits (alerts
	// are never dropped).
	alerts chan alertJob
}

// alertJob is one alert event on its way to the durable publisher.
type alertJob struct {
	stream string
	ev     alerts.Event
}

// alertQueue is the number of alert events a shard holds for its publisher.
const alertQueue = 4096

var _ pipeline.Sink = (*shard)(nil)

func newShard(r *muxRuntime, i int) *shard {
	return &shard{
		r: r, idx: i, in: make(chan *work, shardQueue), acks: make(chan muxAck),
		done: make(chan struct{}), alerts: make(chan alertJob, alertQueue),
		log: r.d.log.With().Int("shard", i).Logger(),
	}
}

// run is the shard's loop until stop ends, then it drains its queue and
// stops its streams. Alerts go out on a context that outlives ctx, so that
// what the drain finds still reaches the spool.
func (sh *shard) run(stop, ctx context.Context) error {
	defer close(sh.done)
	published := make(chan struct{})
	go sh.publish(context.WithoutCancel(ctx), published)
	defer func() {
		close(sh.alerts)
		<-published
	}()
	every := sh.r.d.opts.TickEvery
	if every <= 0 {
		every = time.Second
	}
	tick := time.NewTicker(every)
	defer tick.Stop()
	var lastStatus time.Time
	for {
		select {
		case w := <-sh.in:
			sh.take(w)
		case now := <-tick.C:
			sh.tick(now)
			if now.Sub(lastStatus) >= 5*time.Second {
				lastStatus = now
				sh.heartbeats(now)
			}
		case req := <-sh.acks:
			req.reply <- sh.ack(req)
		case <-stop.Done():
			for {
				select {
				case w := <-sh.in:
					sh.work(w)
					continue
				default:
				}
				break
			}
			for _, st := range sh.streams {
				if !st.done {
					sh.stopped(st, true)
				}
			}
			return nil
		}
	}
}

// work runs the pipelines of the streams of one read.
func (sh *shard) work(w *work) {
	if w.finished != nil {
		for _, st := range sh.streams {
			if st.src == w.finished && !st.done {
				st.done = true
				sh.stopped(st, false)
			}
		}
	}
	for i := range w.items {
		sh.item(&w.items[i], w.arrived)
	}
	sh.cur = nil
	sh.arrived = time.Time{}
	w.release()
}

// item runs one stream's event of a read that arrived at arrived.
func (sh *shard) item(it *workItem, arrived time.Time) {
	st := it.st
	if st.pl == nil {
		sh.started(st)
	}
	sh.cur, sh.arrived = st, arrived
	if it.ev.Status != ingest.StatusNone {
		st.connected.Store(it.ev.Status != ingest.StatusDisconnected)
		sh.emit(st.pl.Status(it.ev, arrived))
	}
	if len(it.ev.Samples) > 0 {
		sh.push(st, it.ev.Samples)
	}
}

// push analyses samples of st, a started stream that sh.cur names.
func (sh *shard) push(st *muxStream, samples []ingest.Sample) {
	if !st.connected.Load() {
		st.connected.Store(true)
	}
	st.pl.Push(samples, sh)
}

// tick lets every stream's time-based conditions advance; a stream that
// went quiet is visited here and nowhere else.
func (sh *shard) tick(now time.Time) {
	for _, st := range sh.streams {
		if st.done {
			continue
		}
		sh.cur = st
		st.pl.TickTo(now, sh)
		sh.ticked(st, now)
	}
	sh.cur = nil
}

// ack acknowledges an alarm of one of the shard's streams.
func (sh *shard) ack(req muxAck) error {
	st := req.st
	if st.pl == nil || st.done {
		return errNotRunning(st.id)
	}
	out, err := st.pl.Ack(req.id, req.by, time.Now())
	if err != nil {
		return err
	}
	sh.cur = st
	sh.emit(out)
	sh.cur = nil
	return nil
}

// emit delivers gathered output of the current stream.
func (sh *shard) emit(out stageOutput) {
	for i := range out.Alerts {
		sh.Alert(&out.Alerts[i])
	}
	for i := range out.Breaths {
		sh.Breath(&out.Breaths[i])
	}
}

// Breath hands a breath of the current stream to the bulletin.
func (sh *shard) Breath(b *analyze.Breath) {
	st := sh.cur
	if b.Stream == "" {
		b.Stream = st.id
	}
	sh.r.d.del.Breath(b)
	st.breaths.Add(1)
	st.breathsC.Inc()
	if !sh.arrived.IsZero() {
		sh.r.d.m.breathLatency.Observe(time.Since(sh.arrived).Seconds())
	}
}

// publish makes the shard's alert events durable in order, until the
// queue is closed and drained. A spool that refuses one is logged. The
// alarms' ledger (ledger.go) learns of an alarm's raise, escalation or
// acknowledgement before the spool does, in one write and sync for the
// events queued together, and of its end once the spool holds it: a kill
// at any moment then leaves no alarm that a subscriber may have seen open
// unknown to the next start.
func (sh *shard) publish(ctx context.Context, done chan<- struct{}) {
	defer close(done)
	var batch []alertJob
	var evs []alerts.Event
	for j := range sh.alerts {
		batch = append(batch[:0], j)
	gather:
		for len(batch) < ledgerBatch {
			select {
			case j, ok := <-sh.alerts:
				if !ok {
					break gather
				}
				batch = append(batch, j)
			default:
				break gather
			}
		}
		evs = evs[:0]
		for i := range batch {
			evs = append(evs, batch[i].ev)
		}
		sh.r.d.ledger.keepOpening(sh.r.d.log, sh.r.d.m, evs)
		for i := range batch {
			sh.publishOne(ctx, &batch[i])
		}
	}
}

// ledgerBatch bounds the alert events a shard's publisher records in the
// ledger with one write and sync.
const ledgerBatch = 256

// publishOne makes one alert event durable.
func (sh *shard) publishOne(ctx context.Context, j *alertJob) {
	if err := sh.r.d.del.Publish(ctx, j.ev); err != nil {
		sh.log.Error().Err(err).Str("stream", j.stream).Str("alert", j.ev.DedupID()).Msg("alert not made durable")
		return
	}
	sh.r.d.m.alerts.WithLabelValues(j.stream, j.ev.Condition, string(j.ev.State)).Inc()
	if j.ev.State.Terminal() {
		sh.r.d.ledger.keep(sh.r.d.log, sh.r.d.m, false, j.ev)
	}
}

// Alert queues an alert event of the current stream for the publisher and
// keeps the stream's set of raised alarms.
func (sh *shard) Alert(ev *alerts.Event) {
	st := sh.cur
	sh.alerts <- alertJob{stream: st.id, ev: *ev}
	if ev.Supersedes != "" {
		delete(st.activeIDs, ev.Supersedes)
	}
	if ev.State == alerts.Cleared {
		delete(st.activeIDs, ev.ID)
	} else {
		st.activeIDs[ev.ID] = struct{}{}
	}
	st.active.Store(int64(len(st.activeIDs)))
}

// heartbeats publishes the status message of every running stream.
func (sh *shard) heartbeats(now time.Time) {
	for _, st := range sh.streams {
		if st.done {
			continue
		}
		publishStatus(sh.r.d.del, st.id, now, true, st.connected.Load(), st.breaths.Load(), st.active.Load(), 0)
	}
}

// The per-stream lifecycle: the one place where state that outlives a
// stream's pipeline plugs in. started runs on the shard when a stream's
// first event arrives (restore a snapshot here); ticked on every tick (save
// one every few seconds here); stopped when its finite source ended or the
// daemon stops (save the last one here).

// started creates the stream's pipeline on its shard.
func (sh *shard) started(st *muxStream) {
	s := st.src
	st.pl = pipeline.New(pipeline.Options{
		Stream: st.id, Analysis: s.settings.Analysis, Detectors: s.settings.Detectors,
		Alarms: s.settings.Alarms, Stats: s.src.Stats, Now: sh.wall, Digest: s.digest,
	})
	st.activeIDs = map[string]struct{}{}
	sh.streams = append(sh.streams, st)
}

// wall is the pipelines' clock: the time the read being analysed was
// decoded, which is when its samples arrived (and saves reading the clock
// for every read of every stream), or the present outside a read.
func (sh *shard) wall() time.Time {
	if !sh.arrived.IsZero() {
		return sh.arrived
	}
	return time.Now()
}

// ticked runs after each tick of a running stream.
func (sh *shard) ticked(*muxStream, time.Time) {}

// stopped runs once when a stream ends: its finite source ended, or the
// daemon stops (shutdown). At a shutdown its open alarms end with
// alerts.ReasonStopped: a stream of a multiplexed source keeps no
// checkpoint, so the next start cannot resume them (a stream of its own
// can, daemon/continuity.go), and without an end they stayed open for
// every subscriber. A condition still present is raised again, under a new
// id, once the next start has seen it for its delay. An alarm left open by
// a finished recording stays as the recording left it. After a kill,
// stopped does not run: the alarm ledger (ledger.go) ends them at the
// next start.
func (sh *shard) stopped(st *muxStream, shutdown bool) {
	sh.cur = st
	sh.emit(st.pl.Flush())
	if shutdown {
		sh.emit(st.pl.EndAlarms(time.Now(), alerts.ReasonStopped))
	}
	sh.cur = nil
}
