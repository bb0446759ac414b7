package scaleout

import (
	"context"
	"errors"
	"fmt"
	"strconv"
	"time"

	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/analyze"
	"trapline/daemon/bus"
	"trapline/ingest"
)

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
	breaths        uint64  // breaths published by this runner
	lastS, periodS float64 // last sample time; smallest interval seen
	haveLast       bool
	status         time.Time // last status heartbeat
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
	// ckptFailing is set while checkpoint writes fail for a reason other
	// than fencing; it keeps the warning to one per episode.
	ckptFailing bool
	acks        chan streamAck
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
	prev, err := pt.claim(ctx)
	if err != nil {
		return err
	}
	start, err := pt.loadStreams(ctx)
	if err != nil {
		return err
	}
	msgs, stop := pt.consume(ctx, start)
	defer stop()
	log.Info().Str("previous_owner", prev).Uint64("checkpoint_seq", pt.rec.Seq).Int("streams", len(pt.streams)).
		Time("replay_from", start.Add(-w.cfg.ScaleOut.Warmup)).Msg("partition claimed")
	return pt.loop(ctx, msgs)
}

// consume reads the partition's samples from start minus the warm-up (all
// of them when start is zero) on a goroutine of its own (see partReader);
// stop ends it.
func (pt *partition) consume(ctx context.Context, start time.Time) (<-chan jetstream.Msg, func()) {
	w := pt.w
	r := &partReader{js: w.js, stream: w.names.samples, subject: w.names.partSubject(pt.p), log: pt.log}
	if !start.IsZero() {
		r.start = start.Add(-w.cfg.ScaleOut.Warmup)
	}
	rctx, cancel := context.WithCancel(ctx)
	msgs := make(chan jetstream.Msg, 256)
	go func() {
		defer close(msgs)
		r.run(rctx, msgs)
	}()
	stop := func() {
		cancel()
		for range msgs { //nolint:revive // drain so the reader can end
		}
	}
	return msgs, stop
}

// loop analyses the partition's messages, ticks, writes checkpoints and
// serves acknowledgements until ctx ends or something fails.
func (pt *partition) loop(ctx context.Context, msgs <-chan jetstream.Msg) error {
	tick := time.NewTicker(pt.w.tick)
	defer tick.Stop()
	ckpt := time.NewTicker(pt.w.cfg.ScaleOut.Checkpoint)
	defer ckpt.Stop()
	for {
		select {
		case <-ctx.Done():
			return nil
		case m, ok := <-msgs:
			if !ok {
				if ctx.Err() != nil {
					return nil
				}
				return fmt.Errorf("read partition %d: consumer ended", pt.p)
			}
			if err := pt.message(ctx, m); err != nil {
				return err
			}
		case now := <-tick.C:
			if err := pt.tick(ctx, now); err != nil {
				return err
			}
		case <-ckpt.C:
			if err := pt.settle(pt.checkpoint(ctx)); err != nil {
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
	sr.gaps()
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
	// The id makes a breath published again after a hand-over (the replayed
	// stretch) a duplicate the breaths stream drops.
	l.pt.w.bull.BreathWithID(b, l.sr.id+"/"+strconv.Itoa(b.Seq)+"/"+strconv.FormatFloat(b.StartS, 'f', 3, 64))
	l.sr.breaths++
	l.pt.w.host.CountBreath(l.sr.id)
}

// Alert gathers an alert event. Its breath number needs no mapping: Breath
// renumbers each breath before the pipeline's detectors see it, so the
// findings, and the alarms restored from a checkpoint, already carry the
// published numbers.
func (l *liveSink) Alert(e *alerts.Event) { *l.evs = append(*l.evs, *e) }

// deliver publishes alert events, each until JetStream acknowledges it,
// and then writes the stream's checkpoint at once, so that a checkpoint
// never covers an alert that is not stored.
func (pt *partition) deliver(ctx context.Context, sr *streamRun, evs []alerts.Event) error {
	if len(evs) == 0 {
		return nil
	}
	for i := range evs {
		if err := pt.w.pub.PublishNow(ctx, evs[i]); err != nil {
			return err
		}
		pt.w.host.CountAlert(sr.id, evs[i].Condition, string(evs[i].State))
	}
	return pt.settle(pt.saveStream(ctx, sr))
}

// settle decides what a failed checkpoint write means. Fenced: another
// worker owns the partition, and the runner must stop. Anything else (a
// leader election of the state bucket, a lost connection) only delays the
// checkpoint: the stream stays dirty and the next period writes it, while
// analysis goes on. A checkpoint may lag; it never runs ahead of what is
// stored, so a lagging one costs only a longer replay after a hand-over.
func (pt *partition) settle(err error) error {
	switch {
	case errors.Is(err, errFenced):
		return err
	case err == nil && pt.ckptFailing:
		pt.ckptFailing = false
		pt.log.Info().Msg("checkpoints stored again")
	case err != nil && !pt.ckptFailing:
		pt.ckptFailing = true
		pt.log.Warn().Err(err).Msg("checkpoint not stored; analysis goes on and the next period tries again")
	}
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
		pt.heartbeat(sr, now)
		evs = evs[:0]
		sr.pl.TickTo(now, &liveSink{pt: pt, sr: sr, evs: &evs})
		if err := pt.deliver(ctx, sr, evs); err != nil {
			return err
		}
	}
	return nil
}

// statusEvery is the period of a stream's status heartbeat from its owner.
const statusEvery = 5 * time.Second

// heartbeat publishes the stream's status (<prefix>.status.<stream>) from
// the worker that owns it, every statusEvery: a stream whose heartbeat
// stops, or says connected false, is stalled. Connected means samples were
// stored in the last 3 s.
func (pt *partition) heartbeat(sr *streamRun, now time.Time) {
	if now.Sub(sr.status) < statusEvery {
		return
	}
	sr.status = now
	st := bus.StreamStatus{Type: "status", Schema: 1, Stream: sr.id, Time: now.UTC(), Running: true,
		Connected: now.Sub(sr.wall) < 3*time.Second, Breaths: sr.breaths, Worker: pt.w.id}
	if b, err := st.Marshal(); err == nil {
		pt.w.bull.Status(sr.id, b)
	}
}

// gaps reports holes in the stream's sample times to the pipeline as a
// source reports them (a gap longer than 1.5 periods, the period being the
// smallest interval seen), so that the sample-gaps alarm is raised for a
// batch the edge had to drop as well as for one its source missed: an
// edge drop is never silent downstream.
func (sr *streamRun) gaps() {
	for _, smp := range sr.buf {
		if sr.haveLast {
			d := smp.TimeS - sr.lastS
			if d > 0 && (sr.periodS == 0 || d < sr.periodS) {
				sr.periodS = d
			}
			if sr.periodS > 0 && d > 1.5*sr.periodS {
				sr.pl.Status(ingest.Event{Stream: sr.id, Status: ingest.StatusGap, GapS: d - sr.periodS}, sr.wall)
			}
		}
		sr.lastS, sr.haveLast = smp.TimeS, true
	}
}
