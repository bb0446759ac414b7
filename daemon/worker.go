package daemon

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"
	"trapline/daemon/bus"
	"trapline/ingest/backoff"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"
	"golang.org/x/sync/errgroup"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/analyze"
	"trapline/config"
	"trapline/ingest"
)

// worker is the worker role: it analyses the streams of the partitions of
// the samples stream that it owns among the live workers (rendezvous
// hashing), and hands a partition over when the members change.
//
// Exactly-once across a handover rests on three things (docs/scaleout.md):
//   - the samples stream is the durable log: an owner reads its partition
//     with an ordered consumer from a checkpoint kept in the state bucket;
//   - every checkpoint write is fenced by the key's revision
//     (kv.Update(key, value, revision)), so a worker that lost a partition
//     fails its next write and stops, and a checkpoint only covers alerts
//     that JetStream has acknowledged;
//   - the wall time that alert ids are made from is the time JetStream
//     stored the samples, not the time the worker read them, so a new owner
//     that replays a stretch makes the same ids, and JetStream's
//     de-duplication drops the repeats.
type worker struct {
	cfg      *config.Config
	log      zerolog.Logger
	id       string
	names    scaleNames
	js       jetstream.JetStream
	state    jetstream.KeyValue
	subj     alerts.Subjects
	alertsJS string
	bull     *bus.Bulletin
	tick     time.Duration
	m        *metrics
	// routes maps a stream id to the acknowledgement queue of the
	// partition runner that analyses it here.
	routes sync.Map
}

// streamAck is an acknowledgement request on its way to a partition runner.
type streamAck struct {
	stream string
	req    ackRequest
}

// errFenced means another worker has written the partition's state since
// this one read it: it owns the partition now.
var errFenced = errors.New("fenced: another worker owns the partition now")

// runWorker runs the worker role until ctx is cancelled.
func (d *Daemon) runWorker(ctx context.Context) error {
	cfg := d.cfg
	so := &cfg.ScaleOut
	b, err := bus.Open(cfg, d.log)
	if err != nil {
		return err
	}
	defer b.Close()
	js, err := jetstream.New(b.Conn)
	if err != nil {
		return fmt.Errorf("jetstream: %w", err)
	}
	id := so.WorkerID
	if id == "" {
		id = defaultWorkerID()
	}
	w := &worker{
		cfg: cfg, id: id, names: newScaleNames(cfg.NATS.SubjectPrefix), js: js,
		log:  d.log.With().Str("role", "worker").Str("worker", id).Logger(),
		subj: alerts.Subjects{Prefix: cfg.NATS.SubjectPrefix}, tick: d.opts.TickEvery, m: d.m,
	}
	if w.tick <= 0 {
		w.tick = time.Second
	}
	reps := scaleReplicas(b.Conn, so)
	if err := ensureSamplesStream(ctx, js, w.names, so, reps, w.log); err != nil {
		return fmt.Errorf("samples stream: %w", err)
	}
	sc := bus.StreamsConfig(&cfg.NATS)
	w.alertsJS = sc.WithDefaults().Alerts
	if err := retry(ctx, w.log, "alert and breath streams", func(ctx context.Context) error {
		return alerts.EnsureStreams(ctx, js, sc)
	}); err != nil {
		return fmt.Errorf("jetstream streams (nats.alerts_stream, nats.breaths_stream): %w", err)
	}
	mkv, err := ensureMembersBucket(ctx, js, w.names.members, so.MemberTTL, reps, w.log)
	if err != nil {
		return fmt.Errorf("membership bucket %s: %w", w.names.members, err)
	}
	if err := retry(ctx, w.log, "state bucket", func(ctx context.Context) error {
		if w.state, err = js.KeyValue(ctx, w.names.state); err == nil {
			return nil
		}
		w.state, err = js.CreateOrUpdateKeyValue(ctx, jetstream.KeyValueConfig{
			Bucket: w.names.state, Description: "trapline per-stream alarm state and partition checkpoints",
			History: 1, Replicas: reps, Storage: jetstream.FileStorage,
		})
		return err
	}); err != nil {
		return fmt.Errorf("state bucket %s: %w", w.names.state, err)
	}
	w.bull = bus.NewBulletin(b.Conn, cfg.NATS.SubjectPrefix, 0, w.log)
	mem := newMembers(mkv, id, so.Heartbeat, so.MemberTTL, w.log)
	ackSub, err := w.ackService().Subscribe(b.Conn, w.subj)
	if err != nil {
		return fmt.Errorf("subscribe %s: %w", w.subj.All(alerts.KindAck), err)
	}
	defer func() { _ = ackSub.Unsubscribe() }()

	g, gctx := errgroup.WithContext(ctx)
	if err := d.startRoleHTTP(gctx, g, b.Conn, w.bull.Dropped); err != nil {
		return err
	}
	d.ready.set("membership", func() error {
		if !slices.Contains(mem.live(time.Now()), id) {
			return errors.New("not a live member yet")
		}
		return nil
	})
	bullCtx, stopBulletin := context.WithCancel(context.WithoutCancel(ctx))
	defer stopBulletin()
	g.Go(func() error { return w.bull.Run(bullCtx) })
	g.Go(func() error { return mem.Run(gctx) })
	g.Go(func() error {
		defer stopBulletin()
		return w.assign(gctx, mem.changed)
	})
	w.log.Info().Int("partitions", so.Partitions).Int("replicas", reps).Str("nats", b.URL).Msg("trapline worker running")
	if d.opts.Ready != nil {
		d.opts.Ready(Info{NATSURL: b.URL, Client: b.ClientOptions("")})
	}
	err = g.Wait()
	w.log.Info().Msg("trapline worker stopped")
	return err
}

// defaultWorkerID is the host name and the process id.
func defaultWorkerID() string {
	h, _ := os.Hostname()
	h = strings.Map(func(r rune) rune {
		if r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '-' || r == '_' {
			return r
		}
		return '_'
	}, h)
	if h == "" {
		h = "worker"
	}
	return h + "-" + strconv.Itoa(os.Getpid())
}

// ackService passes an acknowledgement request to the partition runner
// that analyses the stream here. Every worker hears the request; only the
// stream's owner answers it, the others stay silent.
func (w *worker) ackService() *bus.AckService {
	return &bus.AckService{
		Here: func(tok string) bool { _, ok := w.routes.Load(tok); return ok },
		Ack: func(ctx context.Context, tok string, body bus.AckRequest) error {
			v, ok := w.routes.Load(tok)
			if !ok {
				return fmt.Errorf("stream %s is being handed over; try again", tok)
			}
			req := streamAck{stream: tok, req: ackRequest{ID: body.ID, By: body.By, Reply: make(chan error, 1)}}
			select {
			case v.(chan streamAck) <- req:
			case <-ctx.Done():
				return fmt.Errorf("stream %s is busy", tok)
			}
			select {
			case err := <-req.req.Reply:
				return err
			case <-ctx.Done():
				return fmt.Errorf("stream %s did not answer in time", tok)
			}
		},
		Silent: true,
		Log:    w.log,
	}
}

// assign starts and stops the partition runners as the live members change.
func (w *worker) assign(ctx context.Context, changed <-chan []string) error {
	type runner struct {
		stop context.CancelFunc
		done chan struct{}
	}
	running := map[int]*runner{}
	defer func() {
		for _, r := range running {
			r.stop()
		}
		for _, r := range running {
			<-r.done
		}
	}()
	for {
		var live []string
		select {
		case <-ctx.Done():
			return nil
		case live = <-changed:
		}
		want := map[int]bool{}
		for _, p := range ownedPartitions(w.id, live, w.cfg.ScaleOut.Partitions) {
			want[p] = true
		}
		var lost, gained []int
		for p, r := range running {
			if !want[p] {
				r.stop()
				<-r.done
				delete(running, p)
				lost = append(lost, p)
			}
		}
		for p := range want {
			if running[p] != nil {
				continue
			}
			pctx, stop := context.WithCancel(ctx)
			r := &runner{stop: stop, done: make(chan struct{})}
			running[p] = r
			gained = append(gained, p)
			go func() {
				defer close(r.done)
				w.supervisePartition(pctx, p)
			}()
		}
		if len(lost)+len(gained) > 0 {
			w.log.Info().Ints("gained", gained).Ints("lost", lost).Int("owned", len(running)).Msg("partitions reassigned")
		}
	}
}

// supervisePartition runs a partition until ctx ends, starting it again
// after a failure (or after being fenced out while this worker still
// believes it owns the partition, which lasts until the views agree).
func (w *worker) supervisePartition(ctx context.Context, p int) {
	log := w.log.With().Int("partition", p).Logger()
	wait := time.Duration(0)
	for {
		err := protect(ctx, func(ctx context.Context) error { return w.runPartition(ctx, p, log) })
		if ctx.Err() != nil {
			return
		}
		wait = min(max(2*wait, 250*time.Millisecond), 10*time.Second)
		log.Warn().Err(err).Dur("restart_in", wait).Msg("partition stopped")
		t := time.NewTimer(wait)
		select {
		case <-ctx.Done():
			t.Stop()
			return
		case <-t.C:
		}
	}
}

// partitionCheckpoint is the record p.<partition> of the state bucket:
// every message of the partition up to Seq has been analysed and its
// alerts acknowledged by JetStream.
type partitionCheckpoint struct {
	Owner string    `json:"owner"`
	Seq   uint64    `json:"seq"`
	Time  time.Time `json:"time"`
}

// streamCheckpoint is the record s.<partition>.<stream>: the stream's
// alarm state after the message Seq, and the last breath number published.
type streamCheckpoint struct {
	Owner     string                `json:"owner"`
	Seq       uint64                `json:"seq"`
	Time      time.Time             `json:"time"`
	BreathSeq int                   `json:"breath_seq"`
	Life      alerts.LifecycleState `json:"lifecycle"`
}

// fencedPut writes key only if it is still at revision rev (0: only if it
// does not exist) and returns the new revision; a conflict is errFenced.
func (w *worker) fencedPut(ctx context.Context, key string, v any, rev uint64) (uint64, error) {
	data, err := json.Marshal(v)
	if err != nil {
		return rev, fmt.Errorf("encode %s: %w", key, err)
	}
	cctx, cancel := context.WithTimeout(ctx, w.cfg.NATS.PublishTimeout+time.Second)
	defer cancel()
	var nrev uint64
	if rev == 0 {
		nrev, err = w.state.Create(cctx, key, data)
	} else {
		nrev, err = w.state.Update(cctx, key, data, rev)
	}
	var apiErr *jetstream.APIError
	if errors.Is(err, jetstream.ErrKeyExists) || errors.As(err, &apiErr) && apiErr.ErrorCode == jetstream.JSErrCodeStreamWrongLastSequence {
		return rev, fmt.Errorf("write %s: %w", key, errFenced)
	}
	if err != nil {
		return rev, fmt.Errorf("write %s: %w", key, err)
	}
	return nrev, nil
}

// getJSON reads key into v and returns its revision (0 when absent).
func (w *worker) getJSON(ctx context.Context, key string, v any) (uint64, error) {
	cctx, cancel := context.WithTimeout(ctx, w.cfg.NATS.PublishTimeout+time.Second)
	defer cancel()
	e, err := w.state.Get(cctx, key)
	if errors.Is(err, jetstream.ErrKeyNotFound) {
		return 0, nil
	}
	if err != nil {
		return 0, fmt.Errorf("read %s: %w", key, err)
	}
	if err := json.Unmarshal(e.Value(), v); err != nil {
		return 0, fmt.Errorf("decode %s: %w", key, err)
	}
	return e.Revision(), nil
}

// streamRun is the analysis of one stream inside a partition runner.
type streamRun struct {
	id    string
	key   string
	pl    *pipeline.Pipeline
	dec   *ingest.BinaryDecoder
	buf   []ingest.Sample
	wall  time.Time // store time of the message being analysed
	rec   streamCheckpoint
	rev   uint64
	had   bool   // a checkpoint was found at the start
	warm  bool   // replaying what the previous owner already analysed
	until uint64 // last sequence of the warm-up
	// lastWarmBreath is the analyzer's number of the last breath of the
	// warm-up; off maps the analyzer's numbers onto the published ones.
	lastWarmBreath int
	off            int
	lastBreath     int // last published breath number
	seq            uint64
	dirty          bool
}

// partition is the state of one partition runner.
type partition struct {
	w       *worker
	p       int
	log     zerolog.Logger
	rec     partitionCheckpoint
	rev     uint64
	streams map[string]*streamRun
	lastSeq uint64
	lastT   time.Time
	caught  bool // the consumer has nothing pending
	acks    chan streamAck
}

// runPartition claims partition p, rebuilds the state of its streams from
// the checkpoints and the recent samples, and analyses it until ctx ends or
// another worker fences it out.
func (w *worker) runPartition(ctx context.Context, p int, log zerolog.Logger) error {
	pt := &partition{w: w, p: p, log: log, streams: map[string]*streamRun{}, acks: make(chan streamAck)}
	defer func() {
		for id := range pt.streams {
			w.routes.CompareAndDelete(id, pt.acks)
		}
	}()
	pkey := "p." + strconv.Itoa(p)
	rev, err := w.getJSON(ctx, pkey, &pt.rec)
	if err != nil {
		return err
	}
	claim := pt.rec
	claim.Owner = w.id
	if pt.rev, err = w.fencedPut(ctx, pkey, claim, rev); err != nil {
		return err
	}
	prev := pt.rec.Owner
	pt.lastSeq, pt.lastT = pt.rec.Seq, pt.rec.Time

	// The checkpoints of the partition's streams.
	start := pt.rec.Time
	lister, err := w.state.ListKeysFiltered(ctx, "s."+strconv.Itoa(p)+".*")
	if err != nil && !errors.Is(err, jetstream.ErrNoKeysFound) {
		return fmt.Errorf("list stream checkpoints: %w", err)
	}
	if lister != nil {
		var keys []string
		for k := range lister.Keys() {
			keys = append(keys, k)
		}
		_ = lister.Stop()
		for _, k := range keys {
			var rec streamCheckpoint
			rev, err := w.getJSON(ctx, k, &rec)
			if err != nil {
				return err
			}
			if rev == 0 {
				continue
			}
			sr, err := pt.newStream(k[strings.LastIndexByte(k, '.')+1:])
			if err != nil {
				return err
			}
			sr.rec, sr.rev, sr.had = rec, rev, true
			sr.until = max(sr.until, rec.Seq)
			if start.IsZero() || rec.Time.Before(start) {
				start = rec.Time
			}
		}
	}
	cfg := jetstream.OrderedConsumerConfig{FilterSubjects: []string{w.names.partSubject(p)}, DeliverPolicy: jetstream.DeliverAllPolicy}
	if !start.IsZero() {
		t := start.Add(-w.cfg.ScaleOut.Warmup)
		cfg.DeliverPolicy, cfg.OptStartTime = jetstream.DeliverByStartTimePolicy, &t
	}
	cons, err := w.js.OrderedConsumer(ctx, w.names.samples, cfg)
	if err != nil {
		return fmt.Errorf("consumer of partition %d: %w", p, err)
	}
	it, err := cons.Messages(jetstream.PullMaxMessages(512))
	if err != nil {
		return fmt.Errorf("consume partition %d: %w", p, err)
	}
	msgs := make(chan jetstream.Msg, 256)
	readErr := make(chan error, 1)
	go func() {
		defer close(msgs)
		for {
			m, err := it.Next()
			if err != nil {
				if !errors.Is(err, jetstream.ErrMsgIteratorClosed) {
					readErr <- err
				}
				return
			}
			select {
			case msgs <- m:
			case <-ctx.Done():
				return
			}
		}
	}()
	defer func() {
		it.Stop()
		for range msgs { //nolint:revive // drain so the reader can end
		}
	}()
	log.Info().Str("previous_owner", prev).Uint64("checkpoint_seq", pt.rec.Seq).Int("streams", len(pt.streams)).
		Time("replay_from", start.Add(-w.cfg.ScaleOut.Warmup)).Msg("partition claimed")

	tick := time.NewTicker(w.tick)
	defer tick.Stop()
	ckpt := time.NewTicker(w.cfg.ScaleOut.Checkpoint)
	defer ckpt.Stop()
	for {
		select {
		case <-ctx.Done():
			return nil
		case err := <-readErr:
			return fmt.Errorf("read partition %d: %w", p, err)
		case m, ok := <-msgs:
			if !ok {
				if ctx.Err() != nil {
					return nil
				}
				return fmt.Errorf("read partition %d: consumer ended", p)
			}
			if err := pt.message(ctx, m); err != nil {
				return err
			}
		case now := <-tick.C:
			if err := pt.tick(ctx, now); err != nil {
				return err
			}
		case <-ckpt.C:
			if err := pt.checkpoint(ctx); err != nil {
				return err
			}
		case a := <-pt.acks:
			err := pt.ack(ctx, a)
			a.req.Reply <- err
			if errors.Is(err, errFenced) {
				return err
			}
		}
	}
}

// newStream starts the analysis of a stream of the partition.
func (pt *partition) newStream(id string) (*streamRun, error) {
	cfg := pt.w.cfg
	sr := &streamRun{id: id, key: "s." + strconv.Itoa(pt.p) + "." + id, lastWarmBreath: -1, lastBreath: -1}
	sr.rec.BreathSeq = -1
	// The pipeline's wall clock is the store time of the message analysed.
	// Until the hand-over point its alert events are thrown away: the
	// previous owner has published them.
	sr.pl = pipeline.New(pipeline.Options{Stream: id, Analysis: cfg.Analysis, Detectors: cfg.Detectors,
		Alarms: cfg.Alarms, Now: func() time.Time { return sr.wall }})
	sr.warm, sr.until = true, pt.rec.Seq
	dec, err := ingest.NewBinaryDecoder(ingest.DecoderOptions{Stream: id}, func(_ string, s ingest.Sample) {
		sr.buf = append(sr.buf, s)
	})
	if err != nil {
		return nil, fmt.Errorf("stream %s: %w", id, err)
	}
	sr.dec = dec
	pt.streams[id] = sr
	pt.w.routes.Store(id, pt.acks)
	return sr, nil
}

// ack acknowledges an alarm of a live stream. The acknowledgement is not in
// the samples, so it is delivered and written to the checkpoint at once: a
// new owner restores it from there.
func (pt *partition) ack(ctx context.Context, a streamAck) error {
	sr := pt.streams[a.stream]
	if sr == nil || sr.warm {
		return fmt.Errorf("stream %s is still being taken over; try again", a.stream)
	}
	out, err := sr.pl.Ack(a.req.ID, a.req.By, time.Now())
	if err != nil {
		return err
	}
	if err := pt.deliver(ctx, sr, out.Alerts); err != nil {
		return err
	}
	pt.log.Info().Str("stream", sr.id).Str("id", a.req.ID).Str("by", a.req.By).Msg("alert acknowledged")
	return nil
}

// goLive ends the warm-up of a stream: the alarms continue from the
// checkpoint and breath numbers from the last published one.
func (pt *partition) goLive(sr *streamRun) error {
	sr.warm = false
	if sr.had {
		if err := sr.pl.RestoreAlarms(sr.rec.Life); err != nil {
			return err
		}
		sr.off = sr.rec.BreathSeq + 1 - (sr.lastWarmBreath + 1)
		sr.lastBreath = sr.rec.BreathSeq
	} else {
		sr.pl.ResetAlarms()
	}
	return nil
}

// message analyses one message of the partition.
func (pt *partition) message(ctx context.Context, m jetstream.Msg) error {
	meta, err := m.Metadata()
	if err != nil {
		return nil // not a stream message
	}
	seq := meta.Sequence.Stream
	pt.lastSeq, pt.lastT, pt.caught = seq, meta.Timestamp, meta.NumPending == 0
	_, id, ok := pt.w.names.partOf(m.Subject())
	if !ok || !ingest.ValidStreamID(id) {
		return nil
	}
	sr := pt.streams[id]
	if sr == nil {
		if sr, err = pt.newStream(id); err != nil {
			return err
		}
	}
	sr.buf = sr.buf[:0]
	_, _ = sr.dec.Write(m.Data())
	if len(sr.buf) == 0 {
		return nil
	}
	sr.wall = meta.Timestamp
	if sr.warm && seq > sr.until {
		if err := pt.goLive(sr); err != nil {
			return err
		}
	}
	sr.seq = seq
	if sr.warm {
		sr.pl.Push(sr.buf, warmSink{sr})
		return nil
	}
	sr.dirty = true
	var evs []alerts.Event
	sr.pl.Push(sr.buf, &liveSink{pt: pt, sr: sr, evs: &evs})
	return pt.deliver(ctx, sr, evs)
}

// warmSink notes the breath numbers of the warm-up and throws its alert
// events away.
type warmSink struct{ sr *streamRun }

func (w warmSink) Breath(b *analyze.Breath) { w.sr.lastWarmBreath = b.Seq }
func (warmSink) Alert(*alerts.Event)        {}

// liveSink publishes breaths (renumbered) and gathers alert events.
type liveSink struct {
	pt  *partition
	sr  *streamRun
	evs *[]alerts.Event
}

func (l *liveSink) Breath(b *analyze.Breath) {
	b.Seq += l.sr.off
	l.sr.lastBreath = b.Seq
	l.pt.w.bull.Breath(b)
	l.pt.w.m.breaths.WithLabelValues(l.sr.id).Inc()
}

func (l *liveSink) Alert(e *alerts.Event) {
	if e.BreathSeq != nil {
		v := *e.BreathSeq + l.sr.off
		e.BreathSeq = &v
	}
	*l.evs = append(*l.evs, *e)
}

// deliver publishes alert events, each until JetStream acknowledges it,
// and then writes the stream's checkpoint at once, so that a checkpoint
// never covers an alert that is not stored.
func (pt *partition) deliver(ctx context.Context, sr *streamRun, evs []alerts.Event) error {
	if len(evs) == 0 {
		return nil
	}
	for i := range evs {
		if err := pt.w.publishAlert(ctx, &evs[i]); err != nil {
			return err
		}
		pt.w.m.alerts.WithLabelValues(sr.id, evs[i].Condition, string(evs[i].State)).Inc()
	}
	return pt.saveStream(ctx, sr)
}

// publishAlert sends one event with its de-duplication id, retrying with
// the same id until JetStream acknowledges it or ctx ends.
func (w *worker) publishAlert(ctx context.Context, ev *alerts.Event) error {
	data, err := ev.Marshal()
	if err != nil {
		return err
	}
	subj := w.subj.Alert(ev.Stream)
	b := backoff.Backoff{Min: 100 * time.Millisecond, Max: 2 * time.Second, Jitter: 0.2}
	for {
		cctx, cancel := context.WithTimeout(ctx, w.cfg.NATS.PublishTimeout)
		_, err := w.js.PublishMsg(cctx, &nats.Msg{Subject: subj, Data: data},
			jetstream.WithMsgID(ev.DedupID()), jetstream.WithExpectStream(w.alertsJS))
		cancel()
		if err == nil {
			return nil
		}
		if ctx.Err() != nil {
			return fmt.Errorf("publish alert %s: %w", ev.DedupID(), ctx.Err())
		}
		w.log.Warn().Err(err).Str("id", ev.DedupID()).Msg("alert publish failed; retrying with the same id")
		if !b.Wait(ctx) {
			return fmt.Errorf("publish alert %s: %w", ev.DedupID(), ctx.Err())
		}
	}
}

// saveStream writes a stream's checkpoint, fenced by its revision.
func (pt *partition) saveStream(ctx context.Context, sr *streamRun) error {
	rec := streamCheckpoint{Owner: pt.w.id, Seq: sr.seq, Time: sr.wall, BreathSeq: sr.lastBreath, Life: sr.pl.Alarms()}
	rev, err := pt.w.fencedPut(ctx, sr.key, rec, sr.rev)
	if err != nil {
		return err
	}
	sr.rec, sr.rev, sr.had, sr.dirty = rec, rev, true, false
	return nil
}

// tick runs the time-based checks of the live streams, only once the
// partition has caught up: during a replay the store times lag the clock
// and every stream would look silent.
func (pt *partition) tick(ctx context.Context, now time.Time) error {
	if !pt.caught {
		return nil
	}
	var evs []alerts.Event
	for _, sr := range pt.streams {
		if sr.warm {
			continue
		}
		evs = evs[:0]
		sr.pl.TickTo(now, &liveSink{pt: pt, sr: sr, evs: &evs})
		if err := pt.deliver(ctx, sr, evs); err != nil {
			return err
		}
	}
	return nil
}

// checkpoint writes the changed streams and then the partition's position.
func (pt *partition) checkpoint(ctx context.Context) error {
	if pt.lastSeq <= pt.rec.Seq {
		return nil // still replaying what is already covered
	}
	for _, sr := range pt.streams {
		if sr.dirty {
			if err := pt.saveStream(ctx, sr); err != nil {
				return err
			}
		}
	}
	rec := partitionCheckpoint{Owner: pt.w.id, Seq: pt.lastSeq, Time: pt.lastT}
	rev, err := pt.w.fencedPut(ctx, "p."+strconv.Itoa(pt.p), rec, pt.rev)
	if err != nil {
		return err
	}
	pt.rec, pt.rev = rec, rev
	return nil
}
