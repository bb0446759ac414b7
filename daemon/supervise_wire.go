package daemon

import (
	"context"
	"errors"
	"fmt"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/analyze"
	"trapline/config"
	"trapline/daemon/bus"
	"trapline/ingest"
)

// delivery is where a stream's output goes: alerts through the spooling
// JetStream publisher, breaths and heartbeats through the bulletin.
type delivery struct {
	pub     *alerts.Publisher
	bull    *bus.Bulletin
	js      jetstream.JetStream
	streams alerts.StreamsConfig
	log     zerolog.Logger
	ensured atomic.Bool
}

var (
	_ alertSink    = (*delivery)(nil)
	_ bulletinSink = (*delivery)(nil)
)

// openDelivery opens the spool and builds the publishers. The spool is
// locked against a second process on the same data directory.
func openDelivery(cfg *config.Config, b *bus.Bus, log zerolog.Logger) (*delivery, error) {
	sc := cfg.JetStream()
	spool, err := alerts.OpenSpool(cfg.SpoolDir(), cfg.Spool.MaxEvents)
	if err != nil {
		return nil, fmt.Errorf("alert spool (spool.dir): %w", err)
	}
	if n := spool.Depth(); n > 0 {
		log.Info().Int("events", n).Str("dir", spool.Dir()).Msg("alert spool holds events from an earlier run; sending them first")
	}
	var pub *alerts.Publisher
	pub, err = alerts.NewPublisher(b.Conn, spool, alerts.PublisherOptions{
		Streams:        sc,
		RequestTimeout: cfg.NATS.PublishTimeout,
		DrainTimeout:   cfg.ShutdownTimeout,
		Log:            log,
		OnForeign:      func(ev alerts.Event) { preempted(pub, ev, log) },
	})
	if err != nil {
		spool.Close()
		return nil, err
	}
	js, err := jetstream.New(b.Conn)
	if err != nil {
		pub.Close()
		return nil, fmt.Errorf("jetstream: %w", err)
	}
	return &delivery{
		pub: pub, js: js, streams: sc, log: log,
		bull: bus.NewBulletin(b.Conn, cfg.NATS.SubjectPrefix, bulletinQueue(cfg), log),
	}, nil
}

// Publish hands an alert event to the durable publisher.
func (d *delivery) Publish(ctx context.Context, ev alerts.Event) error { return d.pub.Publish(ctx, ev) }

// Pressure is how full the alert spool is: 0 empty, 1 full.
func (d *delivery) Pressure() float64 {
	return float64(d.pub.Depth()) / float64(max(d.pub.SpoolMax(), 1))
}

// Breath hands a breath record to the bulletin.
func (d *delivery) Breath(b *analyze.Breath) { d.bull.Breath(b) }

// Status hands a status heartbeat to the bulletin.
func (d *delivery) Status(stream string, data []byte) { d.bull.Status(stream, data) }

// ensureStreams creates the JetStream streams, retrying every two seconds
// while NATS is unreachable, until it succeeds or ctx ends. A refusal by a
// reachable server (a limit that does not fit) is an error.
func (d *delivery) ensureStreams(ctx context.Context, nc *nats.Conn) error {
	warned := false
	for {
		cctx, cancel := context.WithTimeout(ctx, 10*time.Second)
		err := alerts.EnsureStreams(cctx, d.js, d.streams)
		cancel()
		if err == nil {
			d.ensured.Store(true)
			d.log.Info().Str("alerts", d.streams.WithDefaults().Alerts).Str("breaths", d.streams.WithDefaults().Breaths).
				Msg("JetStream streams ready")
			return nil
		}
		if ctx.Err() != nil {
			return nil
		}
		var apiErr *jetstream.APIError
		if nc.IsConnected() && errors.As(err, &apiErr) {
			return fmt.Errorf("jetstream streams (nats.alerts_stream, nats.breaths_stream): %w", err)
		}
		// One warning per outage; the retries go to debug.
		ev := d.log.Debug()
		if !warned {
			ev, warned = d.log.Warn(), true
		}
		ev.Err(err).Msg("JetStream not reachable yet; alerts wait in the spool")
		t := time.NewTimer(2 * time.Second)
		select {
		case <-ctx.Done():
			t.Stop()
			return nil
		case <-t.C:
		}
	}
}

// streamsReady is the readiness check of the JetStream streams.
func (d *delivery) streamsReady() error {
	if !d.ensured.Load() {
		return errors.New("streams not created yet")
	}
	return nil
}

// streamSpec builds the runner's view of one configured stream.
func (d *Daemon) streamSpec(sc config.Stream) (streamSpec, error) {
	cfg := d.cfg
	log := d.log.With().Str("stream", sc.ID).Logger()
	opts := ingest.Options{
		Stream: sc.ID, Columns: sc.Columns, RateHz: sc.SampleRateHz, Log: &log, NATS: d.nc,
	}
	var health func() analyze.Finding
	if d.rec != nil {
		opts.Tap, health = d.rec.w.Tap, d.rec.finding
	}
	// Check the URL now, so that a bad source fails the start.
	if _, err := ingest.Open(sc.Source, opts); err != nil {
		return streamSpec{}, &UsageError{Err: fmt.Errorf("stream %s: source %s: %w", sc.ID, sc.Source, err)}
	}
	u, err := ingest.ParseURL(sc.Source)
	if err != nil {
		return streamSpec{}, &UsageError{Err: fmt.Errorf("stream %s: source %s: %w", sc.ID, sc.Source, err)}
	}
	finite := u.Scheme == "file" || u.Scheme == "stdin"
	var cont *continuity
	if !finite { // a recording is analysed from its start every time
		cont = newContinuity(cfg.DataDir, sc.ID)
	}
	return streamSpec{
		ID:           sc.ID,
		Continuity:   cont,
		SourceStream: u.Stream,
		Finite:       finite,
		Ledger:       d.ledger,
		Overload:     opts.Overload.For(u.Scheme),
		Open: func() (ingest.Source, streamPipeline, error) {
			src, err := ingest.Open(sc.Source, opts)
			if err != nil {
				return nil, nil, err
			}
			return src, pipeline.New(pipeline.Options{Stream: sc.ID, Analysis: cfg.Analysis,
				Detectors: cfg.Detectors, Alarms: cfg.Alarms, Stats: src.Stats,
				KeepBreaths: pipeline.KeepBreaths(cfg.Detectors)}), nil
		},
		TickEvery: d.opts.TickEvery,
		Health:    health,
	}, nil
}

// bulletinQueue sizes the breath and status queue to the streams the
// daemon may carry: every shard publishes the heartbeats of all its streams
// at once, every 5 s, so a ward of thousands needs room for two messages a
// stream besides the default.
func bulletinQueue(cfg *config.Config) int {
	n := len(cfg.Streams)
	for _, s := range cfg.Sources {
		n += s.Streams()
	}
	return bus.DefaultBulletinQueue + 2*n
}
