package daemon

import (
	"context"
	"errors"
	"fmt"
	"runtime/debug"
	"time"

	"github.com/rs/zerolog"

	"trapline/ingest/backoff"
)

// restartPolicy is the restart policy of a supervised part: the wait doubles after
// every failure from Min up to Max, and falls back to Min once a run has
// lasted StableAfter (a part that ran for a while and then failed is not in a
// crash loop).
type restartPolicy struct {
	Min, Max    time.Duration
	StableAfter time.Duration
}

// defaultBackoff restarts a failed stream after 0.5 s, 1 s, 2 s ... up to 30 s.
var defaultBackoff = restartPolicy{Min: 500 * time.Millisecond, Max: 30 * time.Second, StableAfter: time.Minute}

// next returns the wait after the current one.
func (b restartPolicy) next(cur time.Duration) time.Duration {
	return backoff.Double(cur, b.Min, b.Max)
}

// errPanic marks a failure that was a panic turned into an error, so that a
// bug in one stream's analysis does not take the other streams down.
var errPanic = errors.New("panic")

// protect runs f and turns a panic into an error carrying the stack.
func protect(ctx context.Context, f func(context.Context) error) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("%w: %v\n%s", errPanic, r, debug.Stack())
		}
	}()
	return f(ctx)
}

// supervise runs f until ctx is cancelled, restarting it with backoff when it
// returns an error or panics. It returns nil once ctx is cancelled and f has
// returned; f returning nil before that counts as a failure too, since a
// stream is meant to run until shutdown. onState, when not nil, is told when
// f starts (true) and stops (false); onRestart when a restart is scheduled.
func supervise(ctx context.Context, log zerolog.Logger, b restartPolicy, f func(context.Context) error, onState func(up bool), onRestart func(err error, wait time.Duration)) error {
	wait := time.Duration(0)
	for {
		start := time.Now()
		if onState != nil {
			onState(true)
		}
		err := protect(ctx, f)
		if onState != nil {
			onState(false)
		}
		if ctx.Err() != nil {
			if err != nil && !errors.Is(err, context.Canceled) {
				log.Warn().Err(err).Msg("stopped with an error during shutdown")
			}
			return nil
		}
		if errors.Is(err, errFinished) {
			log.Info().Msg("source reached its end; stream finished")
			return nil
		}
		if err == nil {
			err = errors.New("returned before shutdown")
		}
		if time.Since(start) >= b.StableAfter {
			wait = 0
		}
		wait = b.next(wait)
		log.Error().Err(err).Dur("restart_in", wait).Msg("stream failed; restarting")
		if onRestart != nil {
			onRestart(err, wait)
		}
		if !backoff.Sleep(ctx, nil, wait) {
			return nil
		}
	}
}
