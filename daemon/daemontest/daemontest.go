// Package daemontest runs a trapline daemon in the test's own process, for
// tests of other packages: started on a configuration, waited for until it
// is ready, stopped when the test ends.
package daemontest

import (
	"context"
	"errors"
	"testing"
	"time"

	"github.com/rs/zerolog"

	"trapline/config"
	"trapline/daemon"
)

// readyWithin and stopWithin bound the waits for a daemon.
const (
	readyWithin = 30 * time.Second
	stopWithin  = 20 * time.Second
)

// Running is a daemon started by Start.
type Running struct {
	D    *daemon.Daemon
	Info daemon.Info

	cancel context.CancelFunc
	done   chan error
	err    error
	ended  bool
}

// Start runs a daemon on cfg with opts (Ready is Start's own) until Stop or
// the end of the test, and returns it once it is ready. A daemon that
// returns or is not ready within 30 s fails the test.
func Start(tb testing.TB, cfg *config.Config, opts daemon.Options) *Running {
	tb.Helper()
	readyc := make(chan daemon.Info, 1)
	opts.Ready = func(i daemon.Info) { readyc <- i }
	d, err := daemon.New(cfg, zerolog.Nop(), opts)
	if err != nil {
		tb.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	r := &Running{D: d, cancel: cancel, done: make(chan error, 1)}
	go func() { r.done <- d.Run(ctx) }()
	tb.Cleanup(func() {
		if err := r.Stop(); err != nil && !errors.Is(err, context.Canceled) {
			tb.Errorf("daemon: %v", err)
		}
	})
	select {
	case r.Info = <-readyc:
		return r
	case err := <-r.done:
		r.ended, r.err = true, err
		tb.Fatalf("daemon returned before it was ready: %v", err)
	case <-time.After(readyWithin):
		tb.Fatalf("daemon not ready within %s", readyWithin)
	}
	return r
}

// Stop cancels the daemon and returns what its Run returned; a daemon that
// does not return within 20 s is an error. Stopping again returns the same.
func (r *Running) Stop() error {
	if r.ended {
		return r.err
	}
	r.cancel()
	select {
	case r.err = <-r.done:
	case <-time.After(stopWithin):
		r.err = errors.New("the daemon's run did not return within 20 s of cancellation")
	}
	r.ended = true
	return r.err
}
