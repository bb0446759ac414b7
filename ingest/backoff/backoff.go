// Package backoff is the one retry pause of trapline: a wait that doubles
// after every failure from Min up to Max, with optional jitter, on an
// injectable clock. Sources reopening a device, the daemon restarting a
// stream, and the alert publisher retrying JetStream all use it.
package backoff

import (
	"context"
	"math/rand/v2"
	"time"
)

// Clock is the time source of a Backoff; tests inject their own.
type Clock interface {
	// Now returns the current time.
	Now() time.Time
	// After returns a channel that receives once d has passed, and a
	// function that stops the timer.
	After(d time.Duration) (<-chan time.Time, func() bool)
}

// System is the wall clock.
type System struct{}

// Now returns time.Now().
func (System) Now() time.Time { return time.Now() }

// After starts a time.Timer.
func (System) After(d time.Duration) (<-chan time.Time, func() bool) {
	t := time.NewTimer(d)
	return t.C, t.Stop
}

// Backoff is a capped exponential wait. The zero value of Clock is the
// wall clock. It is not safe for concurrent use.
type Backoff struct {
	Min, Max time.Duration
	// Jitter, between 0 and 1, takes a random fraction of up to Jitter off
	// every wait, so that many clients that failed together do not retry
	// together. The wait never exceeds the nominal one.
	Jitter float64
	// Clock is the time source (nil: the wall clock).
	Clock Clock

	cur time.Duration
}

// Next returns the next wait: Min after a reset, then twice the previous
// one, at most Max; jitter applied.
func (b *Backoff) Next() time.Duration {
	b.cur = Double(b.cur, b.Min, b.Max)
	return b.jittered(b.cur)
}

// Current returns the nominal wait last returned by Next (0 after Reset).
func (b *Backoff) Current() time.Duration { return b.cur }

// Reset starts again from Min.
func (b *Backoff) Reset() { b.cur = 0 }

// Wait sleeps for the next wait and reports false when ctx ended first.
func (b *Backoff) Wait(ctx context.Context) bool { return Sleep(ctx, b.clock(), b.Next()) }

func (b *Backoff) clock() Clock {
	if b.Clock == nil {
		return System{}
	}
	return b.Clock
}

func (b *Backoff) jittered(d time.Duration) time.Duration {
	if b.Jitter <= 0 {
		return d
	}
	return d - time.Duration(min(b.Jitter, 1)*rand.Float64()*float64(d))
}

// Double returns the wait after cur: lo when cur is below it, else twice
// cur, at most hi.
func Double(cur, lo, hi time.Duration) time.Duration {
	if cur < lo {
		return lo
	}
	return min(2*cur, hi)
}

// Sleep waits for d on clock (nil: the wall clock) and reports false when
// ctx ended first.
func Sleep(ctx context.Context, clock Clock, d time.Duration) bool {
	if clock == nil {
		clock = System{}
	}
	c, stop := clock.After(d)
	defer stop()
	select {
	case <-c:
		return true
	case <-ctx.Done():
		return false
	}
}
