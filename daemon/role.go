package daemon

import (
	"context"
	"fmt"
	"trapline/daemon/bus"
	"trapline/daemon/scaleout"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/rs/zerolog"
	"golang.org/x/sync/errgroup"
)

// scaleHost is what the scale-out roles borrow from the daemon.
func (d *Daemon) scaleHost() scaleout.Host {
	return scaleout.Host{
		Config: d.cfg, Log: d.log, TickEvery: d.opts.TickEvery,
		Supervise: func(ctx context.Context, log zerolog.Logger, f func(context.Context) error) error {
			return supervise(ctx, log, defaultBackoff, f, nil, nil)
		},
		Protect:     protect,
		AddSource:   d.m.addSource,
		CountBreath: func(stream string) { d.m.breaths.WithLabelValues(stream).Inc() },
		CountAlert: func(stream, condition, state string) {
			d.m.alerts.WithLabelValues(stream, condition, state).Inc()
		},
		StartHTTP: d.startRoleHTTP,
		SetReady:  d.ready.set,
		Ready: func(b *bus.Bus) {
			if d.opts.Ready != nil {
				d.opts.Ready(Info{NATSURL: b.URL, Client: b.ClientOptions("")})
			}
		},
		Register: func(c prometheus.Collector) { d.m.reg.MustRegister(c) },
		Usage:    func(err error) error { return &UsageError{Err: err} },
	}
}

// runEdge runs the edge role (package scaleout) until ctx is cancelled.
func (d *Daemon) runEdge(ctx context.Context) error { return scaleout.RunEdge(ctx, d.scaleHost()) }

// runWorker runs the worker role (package scaleout) until ctx is cancelled.
func (d *Daemon) runWorker(ctx context.Context) error { return scaleout.RunWorker(ctx, d.scaleHost()) }

// startRoleHTTP serves /healthz, /readyz and /metrics for the edge and
// worker roles when http.listen is set; the server runs in g until ctx
// ends. Readiness starts with the NATS connection; the roles add checks.
func (d *Daemon) startRoleHTTP(ctx context.Context, g *errgroup.Group, nc *nats.Conn, dropped func() uint64) error {
	d.ready.set("nats", func() error {
		if !nc.IsConnected() {
			return fmt.Errorf("not connected (%s)", nc.Status())
		}
		return nil
	})
	// No spool in these roles: the samples stream is the durable log.
	d.m.setDelivery(func() int { return 0 }, nc.IsConnected, dropped)
	if d.cfg.HTTP.Listen == "" {
		return nil
	}
	h, err := newHTTPServer(d.cfg.HTTP.Listen, d.cfg.HTTP.Pprof, d.m, d.ready, d.log.With().Str("component", "http").Logger())
	if err != nil {
		return err
	}
	g.Go(func() error { return h.Run(ctx) })
	return nil
}
