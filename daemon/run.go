package daemon

import (
	"context"
	"errors"
	"fmt"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"
	"golang.org/x/sync/errgroup"

	"trapline/alerts"
	"trapline/config"
	"trapline/daemon/bus"
	"trapline/daemon/web"
	"trapline/ingest/record"
)

// Options are hooks for callers that run the daemon in-process (the
// demo and the tests).
type Options struct {
	// Ready, when set, is called once NATS, the streams and HTTP have been
	// started.
	Ready func(Info)
	// TickEvery overrides the period of the streams' time-based checks.
	TickEvery time.Duration
	// RecordFile, when set, creates the recording's segment files instead
	// of the file system (tests play a full disk with it).
	RecordFile func(path string) (record.File, error)
}

// Info tells an in-process caller where the daemon can be reached.
type Info struct {
	// NATSURL is the client URL of the NATS server in use.
	NATSURL string
	// Client reaches that server with the daemon's credentials and TLS
	// (set Name before connecting).
	Client bus.ClientOptions
	// HTTPAddr is the address of /healthz, /readyz and /metrics, or "".
	HTTPAddr string
}

// daemon is one trapline process: its streams and the parts they share.
type Daemon struct {
	cfg     *config.Config
	log     zerolog.Logger
	opts    Options
	m       *metrics
	ready   *readiness
	subj    alerts.Subjects
	nc      *nats.Conn
	serving bool // the HTTP server runs (and closes its listener itself)
	del     *delivery
	rec     *recorder // nil when recording is off
	recPtr  atomic.Pointer[recorder]
	streams []*stream
	byToken map[string]*stream // ack subject token → stream
	hub     *web.Hub           // the live view; nil without HTTP
	mux     *muxRuntime        // the streams of multiplexed sources
	ledger  *alarmLedger       // open alarms without a checkpoint (ledger.go)
}

// newDaemon checks what can be checked before anything starts.
func New(cfg *config.Config, log zerolog.Logger, opts Options) (*Daemon, error) {
	d := &Daemon{
		cfg: cfg, log: log, opts: opts,
		m:       newMetrics(),
		ready:   newReadiness(),
		subj:    alerts.Subjects{Prefix: cfg.NATS.SubjectPrefix},
		byToken: map[string]*stream{},
	}
	return d, nil
}

// Run starts NATS, the publishers, the streams and HTTP, and runs until ctx
// is cancelled. Shutdown goes in the order of the data: the sources stop,
// analysis finishes what was read (its alerts go to the spool), then the
// alert publisher drains to JetStream for at most shutdown_timeout, then the
// bulletin is flushed, the connection drained and the embedded server
// stopped. Whatever is still in the spool is sent at the next start.
func (d *Daemon) Run(ctx context.Context) error {
	cfg := d.cfg
	switch cfg.Role {
	case config.RoleEdge:
		return d.runEdge(ctx)
	case config.RoleWorker:
		return d.runWorker(ctx)
	}
	acks := d.ackService()
	httpSrv, err := d.openHTTP(acks)
	if err != nil {
		return err
	}
	// Until Run serves it, the listener is ours to close.
	defer func() {
		if httpSrv != nil && !d.serving {
			httpSrv.ln.Close()
		}
	}()

	b, err := bus.Open(cfg, d.log)
	if err != nil {
		return err
	}
	defer b.Close()
	d.nc = b.Conn

	del, err := d.startDelivery(ctx, b)
	if err != nil {
		return err
	}
	// Close after Run has returned releases the spool; what is left in it
	// is sent at the next start.
	defer del.pub.Close()
	defer d.closeRecorder()
	defer d.ledger.close()
	if err := d.startStreams(ctx, del); err != nil {
		return err
	}
	if err := d.addSources(); err != nil {
		return err
	}

	ackSub, err := acks.Subscribe(b.Conn, d.subj)
	if err != nil {
		return fmt.Errorf("subscribe %s: %w", d.subj.All(alerts.KindAck), err)
	}

	g, gctx := errgroup.WithContext(ctx)
	// The publishers run on a context of their own that ends only after
	// every stream has stopped, so that alerts found while the streams wind
	// down still go out.
	pubCtx, stopPublishers := context.WithCancel(context.WithoutCancel(ctx))
	defer stopPublishers()
	g.Go(func() error { return del.pub.Run(pubCtx) })
	g.Go(func() error { return del.ensureStreams(gctx, b.Conn) })
	g.Go(func() error { return del.bull.Run(pubCtx) })
	g.Go(func() error {
		defer stopPublishers()
		sg := new(errgroup.Group)
		for _, s := range d.streams {
			sg.Go(func() error { return s.Run(gctx) })
		}
		sg.Go(func() error { return d.mux.run(gctx) })
		err := sg.Wait()
		_ = ackSub.Unsubscribe()
		d.closeRecorder()
		return err
	})
	if httpSrv != nil {
		d.serving = true
		g.Go(func() error { return httpSrv.Run(gctx) })
		g.Go(func() error { return d.hub.Run(gctx) })
	}

	d.announce(b, httpSrv)

	return d.wait(ctx, g)
}

// openHTTP opens the listener of health, metrics and the live view when
// http.listen is set (nil otherwise); the live view acknowledges through
// acks, the same service as the NATS requests.
func (d *Daemon) openHTTP(acks *bus.AckService) (*httpServer, error) {
	if d.cfg.HTTP.Listen == "" {
		return nil, nil
	}
	h, err := newHTTPServer(d.cfg.HTTP.Listen, d.cfg.HTTP.Pprof, d.m, d.ready, d.log.With().Str("component", "http").Logger())
	if err != nil {
		return nil, err
	}
	d.startLiveView(h, acks)
	return h, nil
}

// finish logs the end of the run.
func (d *Daemon) finish(err error) error {
	if err != nil {
		return err
	}
	d.log.Info().Msg("trapline stopped")
	return nil
}

// ackService serves the acknowledgements of the streams of this process.
func (d *Daemon) ackService() *bus.AckService {
	return &bus.AckService{
		Here: func(tok string) bool { return d.byToken[tok] != nil || d.mux.has(tok) || d.ledger.endedOf(tok) },
		Ack: func(ctx context.Context, tok string, req bus.AckRequest) error {
			var id string
			var err error
			if fate, ok := d.ledger.fate(req.ID); ok {
				// Ended by the alarm ledger: the stream's pipeline,
				// started afresh, does not know the id.
				return errors.New(fate)
			}
			if s := d.byToken[tok]; s != nil {
				id, err = s.spec.ID, s.ack(ctx, req.ID, req.By)
			} else {
				id, err = d.mux.ack(ctx, tok, req.ID, req.By)
			}
			if err == nil {
				d.log.Info().Str("stream", id).Str("id", req.ID).Str("by", req.By).Str("why", req.Why).Msg("alert acknowledged")
			}
			return err
		},
		Counted: func(tok, result string) { d.m.acks.WithLabelValues(tok, result).Inc() },
		Log:     d.log,
	}
}

// AlertStreamsReady returns nil once the JetStream streams of the alerts
// and breaths exist, or why not yet.
func (d *Daemon) AlertStreamsReady() error {
	if d.del == nil {
		return errors.New("not started")
	}
	return d.del.streamsReady()
}

// SpoolDepth returns how many alert events wait in the spool for JetStream
// (0 before the start).
func (d *Daemon) SpoolDepth() int {
	if d.del == nil {
		return 0
	}
	return d.del.pub.Depth()
}

// startDelivery opens the alert publisher and the bulletin on b, and the
// alarm ledger (which ends, through the spool, the alarms a killed run
// left open), and registers their metrics and readiness checks.
func (d *Daemon) startDelivery(ctx context.Context, b *bus.Bus) (*delivery, error) {
	del, err := openDelivery(d.cfg, b, d.log)
	if err != nil {
		return nil, err
	}
	d.del = del
	if err := d.startLedger(ctx, del); err != nil {
		del.pub.Close()
		return nil, err
	}
	d.m.setDelivery(del.pub.Depth, b.Conn.IsConnected, del.bull.Dropped)
	d.m.addPublisher(del.pub)
	d.ready.set("nats", func() error {
		if !b.Conn.IsConnected() {
			return fmt.Errorf("not connected (%s)", b.Conn.Status())
		}
		return nil
	})
	d.ready.set("jetstream", del.streamsReady)
	return del, nil
}

// addStreams makes the configured streams, delivering to del.
func (d *Daemon) addStreams(del *delivery) error {
	for _, sc := range d.cfg.Streams {
		spec, err := d.streamSpec(sc)
		if err != nil {
			return err
		}
		s := newStream(spec, d.log, d.m, del, del)
		s.view = d.view()
		d.streams = append(d.streams, s)
		d.byToken[alerts.SubjectToken(sc.ID)] = s
		d.ready.set("stream "+sc.ID, s.ready)
	}
	return nil
}

// addSources opens the multiplexed sources; their streams are admitted as
// their first samples arrive.
func (d *Daemon) addSources() error {
	d.mux = newMuxRuntime(d)
	for i, sc := range d.cfg.Sources {
		ms, err := d.mux.addSource(i)
		if err != nil {
			return err
		}
		d.ready.set("source "+sc.Name, ms.ready)
	}
	return nil
}

// wait waits for g, or after ctx is cancelled for the shutdown, bounded by
// shutdown_timeout plus a margin.
func (d *Daemon) wait(ctx context.Context, g *errgroup.Group) error {
	done := make(chan error, 1)
	go func() { done <- g.Wait() }()
	select {
	case err := <-done:
		return d.finish(err)
	case <-ctx.Done():
	}
	d.log.Info().Stringer("limit", d.cfg.ShutdownTimeout).Msg("shutting down: stopping sources, finishing analysis, draining alerts")
	// The publisher's own drain is bounded by shutdown_timeout; the margin
	// covers the sources and analysis before it.
	limit := d.cfg.ShutdownTimeout + 5*time.Second
	t := time.NewTimer(limit)
	defer t.Stop()
	select {
	case err := <-done:
		return d.finish(err)
	case <-t.C:
		return fmt.Errorf("shutdown did not finish within %v; pending alerts stay in the spool %s", limit, d.cfg.SpoolDir())
	}
}

// announce logs that the daemon runs and tells an in-process caller where.
func (d *Daemon) announce(b *bus.Bus, httpSrv *httpServer) {
	info := Info{NATSURL: b.URL, Client: b.ClientOptions("")}
	if httpSrv != nil {
		info.HTTPAddr = httpSrv.Addr()
	}
	ev := d.log.Info().Int("streams", len(d.streams)).Int("sources", len(d.cfg.Sources)).Str("nats", b.URL).Str("http", info.HTTPAddr)
	if d.hub != nil {
		ev = ev.Str("live_view", "http://"+info.HTTPAddr+web.Path)
	}
	ev.Bool("embedded_nats", b.Embedded()).Msg("trapline running")
	if d.opts.Ready != nil {
		d.opts.Ready(info)
	}
}
