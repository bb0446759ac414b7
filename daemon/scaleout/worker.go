package scaleout

import (
	"context"
	"errors"
	"fmt"
	"os"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"
	"golang.org/x/sync/errgroup"

	"trapline/alerts"
	"trapline/config"
	"trapline/daemon/bus"
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
	cfg   *config.Config
	log   zerolog.Logger
	id    string
	names scaleNames
	js    jetstream.JetStream
	state jetstream.KeyValue
	subj  alerts.Subjects
	pub   *alerts.Publisher // direct: the samples stream and the checkpoints are the durable log
	bull  *bus.Bulletin
	tick  time.Duration
	host  Host
	// routes maps a stream id to the acknowledgement queue of the
	// partition runner that analyses it here.
	routes sync.Map
}

// streamAck is an acknowledgement request on its way to a partition runner.
type streamAck struct {
	stream string
	req    ackReq
}

// ackReq carries an acknowledgement to the runner that owns the stream.
type ackReq struct {
	ID, By string
	Reply  chan error
}

// errFenced means another worker has written the partition's state since
// this one read it: it owns the partition now.
var errFenced = errors.New("fenced: another worker owns the partition now")

// RunWorker runs the worker role until ctx is cancelled.
func RunWorker(ctx context.Context, h Host) error {
	cfg := h.Config
	so := &cfg.ScaleOut
	b, err := bus.Open(cfg, h.Log)
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
		log:  h.Log.With().Str("role", "worker").Str("worker", id).Logger(),
		subj: alerts.Subjects{Prefix: cfg.NATS.SubjectPrefix}, tick: h.TickEvery, host: h,
	}
	if w.tick <= 0 {
		w.tick = time.Second
	}
	reps := scaleReplicas(b.Conn, so)
	mkv, err := w.ensureLayout(ctx, b, reps)
	if err != nil {
		return err
	}
	w.bull = bus.NewBulletin(b.Conn, cfg.NATS.SubjectPrefix, 0, w.log)
	mem := newMembers(mkv, id, so.Heartbeat, so.MemberTTL, w.log)
	ackSub, err := w.ackService().Subscribe(b.Conn, w.subj)
	if err != nil {
		return fmt.Errorf("subscribe %s: %w", w.subj.All(alerts.KindAck), err)
	}
	defer func() { _ = ackSub.Unsubscribe() }()

	g, gctx := errgroup.WithContext(ctx)
	if err := h.StartHTTP(gctx, g, b.Conn, w.bull.Dropped); err != nil {
		return err
	}
	h.SetReady("membership", func() error {
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
	if h.Ready != nil {
		h.Ready(b)
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
			req := streamAck{stream: tok, req: ackReq{ID: body.ID, By: body.By, Reply: make(chan error, 1)}}
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

// ensureStateBucket opens or creates the bucket of the checkpoints.
func (w *worker) ensureStateBucket(ctx context.Context, reps int) error {
	err := retry(ctx, w.log, "state bucket", func(ctx context.Context) error {
		var err error
		if w.state, err = w.js.KeyValue(ctx, w.names.state); err == nil {
			return checkReplicas(ctx, w.js, "KV_"+w.names.state, reps)
		}
		w.state, err = w.js.CreateOrUpdateKeyValue(ctx, jetstream.KeyValueConfig{
			Bucket: w.names.state, Description: "trapline per-stream alarm state and partition checkpoints",
			History: 1, Replicas: reps, Storage: jetstream.FileStorage,
		})
		return err
	})
	if err != nil {
		return fmt.Errorf("state bucket %s: %w", w.names.state, err)
	}
	return nil
}

// ensureLayout checks the replicas of every existing stream and bucket,
// then creates or updates them all with reps replicas, and returns the
// membership bucket.
func (w *worker) ensureLayout(ctx context.Context, b *bus.Bus, reps int) (jetstream.KeyValue, error) {
	cfg, so, js := w.cfg, &w.cfg.ScaleOut, w.js
	sc := cfg.JetStream()
	sc.Replicas = reps // one replica count for every stream and bucket
	// Nothing is created or changed before every existing stream and
	// bucket is known to keep its replicas.
	if err := retry(ctx, w.log, "replica check", func(ctx context.Context) error {
		for _, name := range []string{w.names.samples, sc.Alerts, sc.Breaths, "KV_" + w.names.members, "KV_" + w.names.state} {
			if err := checkReplicas(ctx, js, name, reps); err != nil {
				return err
			}
		}
		return nil
	}); err != nil {
		return nil, err
	}
	var err error
	if w.pub, err = alerts.NewDirectPublisher(b.Conn, alerts.PublisherOptions{Streams: sc, Log: w.log,
		RequestTimeout: cfg.NATS.PublishTimeout, RetryMin: 100 * time.Millisecond, RetryMax: 2 * time.Second}); err != nil {
		return nil, err
	}
	if err := retry(ctx, w.log, "alert and breath streams", func(ctx context.Context) error {
		return alerts.EnsureStreams(ctx, js, sc)
	}); err != nil {
		return nil, fmt.Errorf("jetstream streams (nats.alerts_stream, nats.breaths_stream): %w", err)
	}
	// The samples stream comes after the alert and breath streams, so that
	// its byte cap, fitted to the store, leaves them their room.
	if err := ensureSamplesStream(ctx, js, w.names, so, reps, w.log); err != nil {
		return nil, fmt.Errorf("samples stream: %w", err)
	}
	mkv, err := ensureMembersBucket(ctx, js, w.names.members, so.MemberTTL, reps, w.log)
	if err != nil {
		return nil, fmt.Errorf("membership bucket %s: %w", w.names.members, err)
	}
	if err := w.ensureStateBucket(ctx, reps); err != nil {
		return nil, err
	}
	return mkv, nil
}
