// Package scaleout holds the scale-out roles of trapline on a NATS
// JetStream cluster (docs/scaleout.md): the edge, which reads sources and
// publishes their samples to the samples stream, and the worker, which
// analyses the partitions of that stream it owns among the live workers.
// Package daemon runs them; what they need from the running process
// (supervision, metrics, HTTP, readiness) comes in through Host.
package scaleout

import (
	"context"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/rs/zerolog"
	"golang.org/x/sync/errgroup"

	"trapline/config"
	"trapline/daemon/bus"
	"trapline/ingest"
)

// Host is what a scale-out role borrows from the daemon that runs it.
type Host struct {
	// Config is the loaded configuration.
	Config *config.Config
	// Log is the daemon's logger.
	Log zerolog.Logger
	// TickEvery is the period of the time-based checks (0: one second).
	TickEvery time.Duration
	// Supervise runs f until ctx ends, restarting it after failures.
	Supervise func(ctx context.Context, log zerolog.Logger, f func(context.Context) error) error
	// Protect runs f and turns a panic into an error.
	Protect func(ctx context.Context, f func(context.Context) error) error
	// AddSource registers a source's counters with the metrics.
	AddSource func(stream string, stats func() ingest.Stats)
	// CountBreath and CountAlert count what a worker publishes.
	CountBreath func(stream string)
	CountAlert  func(stream, condition, state string)
	// StartHTTP serves health, readiness and metrics in g while ctx lasts;
	// dropped counts the bulletin's lost messages.
	StartHTTP func(ctx context.Context, g *errgroup.Group, nc *nats.Conn, dropped func() uint64) error
	// SetReady adds a readiness check.
	SetReady func(name string, check func() error)
	// Ready, when not nil, is told once the role runs on the bus b.
	Ready func(b *bus.Bus)
	// Register adds a collector to the metrics; nil registers nothing.
	Register func(prometheus.Collector)
	// Usage marks an error as a configuration mistake.
	Usage func(error) error
}
