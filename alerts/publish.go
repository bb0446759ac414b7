package alerts

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"trapline/ingest/backoff"
)

// ErrPublisherClosed is returned by Publish after Close.
var ErrPublisherClosed = errors.New("alert publisher closed")

// ErrEventTooLarge is returned by Publish for an event whose JSON exceeds
// MaxEventBytes. Such an event could never be published (NATS limits a
// message to 1 MiB by default) and would block every later alert behind it.
var ErrEventTooLarge = errors.New("alert event too large")

// MaxEventBytes is the largest encoded alert event Publish accepts; a normal
// event is about 0.5 KiB.
const MaxEventBytes = 64 << 10

// errNotConnected stops a drain while the connection is down: a publish
// then would only sit in the client's reconnect buffer, and every retry
// would add another copy to it.
var errNotConnected = errors.New("not connected to NATS")

// PublisherOptions tune the alert publisher. Zero values take the defaults.
type PublisherOptions struct {
	// Streams names the alerts stream and the subject prefix; it is also
	// what EnsureStreams is called with when a publish finds no stream.
	Streams StreamsConfig
	// RequestTimeout bounds one publish request (default 2 s). Short, so
	// that an unreachable server is noticed quickly; a publish that timed
	// out may still land, and its retry reuses the de-duplication id.
	RequestTimeout time.Duration
	// RetryMin and RetryMax bound the exponential back-off after a failed
	// publish (defaults 100 ms and 5 s).
	RetryMin, RetryMax time.Duration
	// Interval is the period of the drain timer (default 5 s): the spool is
	// retried on it even if no reconnect is ever reported.
	Interval time.Duration
	// DrainTimeout bounds the final drain when Run's context is cancelled
	// or Close is called (default 5 s). Negative: do not drain at all.
	DrainTimeout time.Duration
	// Log receives the publisher's messages (a disabled logger when unset).
	Log zerolog.Logger
	// OnForeign, when set, is called (from the drainer) for every event
	// JetStream answered "duplicate" on its first attempt although this
	// process spooled it: another client stored a message under its
	// de-duplication id first, and the real event was dropped.
	OnForeign func(ev Event)
}

func (o PublisherOptions) withDefaults() PublisherOptions {
	o.Streams = o.Streams.WithDefaults()
	if o.RequestTimeout <= 0 {
		o.RequestTimeout = 2 * time.Second
	}
	if o.RetryMin <= 0 {
		o.RetryMin = 100 * time.Millisecond
	}
	if o.RetryMax < o.RetryMin {
		o.RetryMax = max(5*time.Second, o.RetryMin)
	}
	if o.Interval <= 0 {
		o.Interval = 5 * time.Second
	}
	if o.DrainTimeout == 0 {
		o.DrainTimeout = 5 * time.Second
	}
	return o
}

// PublisherStats are the publisher's counters since it was created.
type PublisherStats struct {
	Published  uint64 // events acknowledged by JetStream as new
	Duplicates uint64 // events JetStream already had (a retry of a publish that had landed)
	Found      uint64 // events found already at the end of the stream after an uncertain publish
	Retries    uint64 // failed publish attempts (each one is retried)
	Refused    uint64 // events refused because the spool was full or could not be written
	Evicted    uint64 // spooled events given up for a higher-ranked one (spool full)
	Foreign    uint64 // duplicates of events this process never sent before (a foreign publish)
	Depth      int    // events waiting in the spool
	Corrupt    int    // unreadable spool files moved aside
}

// Publisher delivers alert events to JetStream without losing or repeating
// any. Publish writes the event to the spool (durably) and wakes the
// drainer; the drainer, a single goroutine in Run, sends the oldest spooled
// event with the de-duplication id Event.DedupID(), deletes it once JetStream
// acknowledges it, and on any error stops and backs off, so events arrive in
// the order they were raised. It drains at start, when the connection comes
// back, on a timer and on every Publish.
//
// A publish whose outcome is unknown (timeout, lost connection) is retried
// with the same id: inside the stream's de-duplication window JetStream drops
// the copy. Beyond the window (a long outage right after the publish went
// out) the drainer first reads the last message on the event's subject and
// skips the event when that message carries its id.
type Publisher struct {
	nc    *nats.Conn
	js    jetstream.JetStream
	spool *Spool
	opts  PublisherOptions
	subj  Subjects
	log   zerolog.Logger

	wake chan struct{}

	published, duplicates, found, retries, refused atomic.Uint64
	foreign                                        atomic.Uint64
	evicted                                        atomic.Uint64

	mu      sync.Mutex
	closed  bool
	stop    context.CancelFunc // set while Run is running
	runDone chan struct{}

	// Drainer state, touched only by the drainer goroutine.
	uncertain uint64 // seq of the entry whose last publish may have landed
	tried     uint64 // seq of the entry last attempted; a duplicate on the first attempt is foreign
	failing   bool   // inside an episode of failed publishes
}

// NewPublisher returns a publisher that sends the events of spool over nc.
// The publisher owns the spool from now on and closes it in Close.
func NewPublisher(nc *nats.Conn, spool *Spool, opts PublisherOptions) (*Publisher, error) {
	if spool == nil {
		return nil, errors.New("new alert publisher: nil spool")
	}
	return newPublisher(nc, spool, opts)
}

// newPublisher makes a publisher with or without a spool.
func newPublisher(nc *nats.Conn, spool *Spool, opts PublisherOptions) (*Publisher, error) {
	if nc == nil {
		return nil, errors.New("new alert publisher: nil connection")
	}
	opts = opts.withDefaults()
	if err := opts.Streams.Validate(); err != nil {
		return nil, fmt.Errorf("new alert publisher: %w", err)
	}
	js, err := jetstream.New(nc)
	if err != nil {
		return nil, fmt.Errorf("new alert publisher: %w", err)
	}
	return &Publisher{
		nc: nc, js: js, spool: spool, opts: opts,
		subj: Subjects{Prefix: opts.Streams.Prefix},
		log:  opts.Log.With().Str("component", "alert-publisher").Logger(),
		wake: make(chan struct{}, 1),
	}, nil
}

// Publish stores ev in the spool and wakes the drainer. When it returns nil
// the event is on disk and will reach JetStream exactly once, across outages
// and restarts. An error means the event was not stored (spool full, disk
// error, invalid event): the caller must log it loudly.
//
// ctx is not consulted: the spool write is local and quick, and an alert
// raised while the daemon shuts down must still be kept.
func (p *Publisher) Publish(_ context.Context, ev Event) error {
	p.mu.Lock()
	closed := p.closed
	p.mu.Unlock()
	if closed {
		return ErrPublisherClosed
	}
	if p.spool == nil {
		return errors.New("publish alert: a direct publisher has no spool (use PublishNow)")
	}
	if err := ev.Validate(); err != nil {
		p.refused.Add(1)
		return fmt.Errorf("publish alert: %w", err)
	}
	data, err := ev.Marshal()
	if err != nil {
		p.refused.Add(1)
		return fmt.Errorf("publish alert: %w", err)
	}
	if len(data) > MaxEventBytes {
		p.refused.Add(1)
		return fmt.Errorf("publish alert %s: %w (%d bytes, at most %d)", ev.DedupID(), ErrEventTooLarge, len(data), MaxEventBytes)
	}
	_, evicted, err := p.spool.AppendRanked(data, EventRank(&ev))
	if evicted {
		p.evicted.Add(1)
	}
	if err != nil {
		p.refused.Add(1)
		return fmt.Errorf("publish alert %s: %w", ev.DedupID(), err)
	}
	p.kick()
	return nil
}

func (p *Publisher) kick() {
	select {
	case p.wake <- struct{}{}:
	default:
	}
}

// SpoolMax returns the spool's capacity in events (0 without a spool).
func (p *Publisher) SpoolMax() int {
	if p.spool == nil {
		return 0
	}
	return p.spool.Max()
}

// Depth returns the number of events waiting in the spool.
func (p *Publisher) Depth() int {
	if p.spool == nil {
		return 0
	}
	return p.spool.Depth()
}

// Stats returns the publisher's counters.
func (p *Publisher) Stats() PublisherStats {
	return PublisherStats{
		Published:  p.published.Load(),
		Duplicates: p.duplicates.Load(),
		Found:      p.found.Load(),
		Retries:    p.retries.Load(),
		Refused:    p.refused.Load(),
		Evicted:    p.evicted.Load(),
		Foreign:    p.foreign.Load(),
		Depth:      p.Depth(),
		Corrupt:    p.corrupt(),
	}
}

func (p *Publisher) corrupt() int {
	if p.spool == nil {
		return 0
	}
	return p.spool.Corrupt()
}

// Run drains the spool until ctx is cancelled or Close is called, then makes
// a last drain bounded by DrainTimeout and returns. It returns an error only
// if it is already running or the publisher is closed.
func (p *Publisher) Run(ctx context.Context) error {
	if p.spool == nil {
		<-ctx.Done() // a direct publisher has nothing to drain
		return nil
	}
	p.mu.Lock()
	if p.closed {
		p.mu.Unlock()
		return ErrPublisherClosed
	}
	if p.stop != nil {
		p.mu.Unlock()
		return errors.New("alert publisher: already running")
	}
	ctx, cancel := context.WithCancel(ctx)
	p.stop = cancel
	done := make(chan struct{})
	p.runDone = done
	p.mu.Unlock()
	defer func() {
		cancel()
		p.mu.Lock()
		p.stop = nil
		p.mu.Unlock()
		close(done)
	}()

	status := p.nc.StatusChanged(nats.CONNECTED)
	defer p.nc.RemoveStatusListener(status)
	tick := time.NewTicker(p.opts.Interval)
	defer tick.Stop()
	retry := time.NewTimer(0) // drain at start
	defer retry.Stop()
	wait := time.Duration(0) // the current retry pause, 0 when not backing off
	// After a restart the oldest event may have landed just before the
	// process died, possibly longer ago than the de-duplication window.
	if e, ok, err := p.spool.Oldest(); err == nil && ok {
		p.uncertain = e.Seq
	}

	for {
		select {
		case <-ctx.Done():
			p.finalDrain()
			return nil
		case <-status:
			// Reconnected: the server is back, try at once.
			wait = 0
		case <-p.wake:
			if wait > 0 {
				continue // backing off; the retry timer comes
			}
		case <-tick.C:
		case <-retry.C:
		}
		if err := p.drain(ctx); err != nil {
			wait = backoff.Double(wait, p.opts.RetryMin, p.opts.RetryMax)
			retry.Reset(wait)
			continue
		}
		wait = 0
	}
}

// finalDrain sends what it can within DrainTimeout on shutdown. What is left
// stays in the spool for the next start.
func (p *Publisher) finalDrain() {
	if p.opts.DrainTimeout < 0 || p.spool.Depth() == 0 {
		return
	}
	ctx, cancel := context.WithTimeout(context.Background(), p.opts.DrainTimeout)
	defer cancel()
	for ctx.Err() == nil && p.spool.Depth() > 0 {
		if err := p.drain(ctx); err == nil {
			break
		}
		select {
		case <-ctx.Done():
		case <-time.After(p.opts.RetryMin):
		}
	}
	if n := p.spool.Depth(); n > 0 {
		p.log.Warn().Int("pending", n).Str("spool", p.spool.Dir()).
			Msg("alerts left in the spool at shutdown; they are sent at the next start")
	}
}

// drain sends spooled events oldest first until the spool is empty or a
// publish fails; it keeps the order by never skipping a failed event.
func (p *Publisher) drain(ctx context.Context) error {
	for ctx.Err() == nil {
		e, ok, err := p.spool.Oldest()
		if err != nil {
			p.noteFailure(err, "read spool")
			return err
		}
		if !ok {
			return nil
		}
		if !p.nc.IsConnected() {
			p.noteFailure(errNotConnected, e.Event.DedupID())
			return errNotConnected
		}
		if err := p.send(ctx, e); err != nil {
			p.retries.Add(1)
			p.noteFailure(err, e.Event.DedupID())
			return err
		}
		if err := p.spool.Remove(e.Seq); err != nil {
			p.noteFailure(err, e.Event.DedupID())
			return err
		}
		if p.failing {
			p.failing = false
			p.log.Info().Int("pending", p.spool.Depth()).Msg("alert delivery resumed")
		}
	}
	return ctx.Err()
}

// send publishes one spooled event and waits for its acknowledgement.
func (p *Publisher) send(ctx context.Context, e SpoolEntry) error {
	subject := p.subj.Alert(e.Event.Stream)
	id := e.Event.DedupID()
	if p.uncertain == e.Seq {
		p.tried = e.Seq // a check counts as an attempt: what it finds may be ours
		landed, err := p.landed(ctx, subject, id)
		if err != nil {
			return err
		}
		if landed {
			p.found.Add(1)
			p.uncertain = 0
			return nil
		}
	}
	rctx, cancel := context.WithTimeout(ctx, p.opts.RequestTimeout)
	defer cancel()
	// No retries inside the client: the drainer retries itself, and must
	// see "no stream" at once to set the stream up.
	ack, err := p.js.Publish(rctx, subject, e.Data, jetstream.WithRetryAttempts(0),
		jetstream.WithMsgID(id), jetstream.WithExpectStream(p.opts.Streams.Alerts))
	if err != nil {
		if errors.Is(err, jetstream.ErrNoStreamResponse) {
			// No stream listens (a server that lost its store, or one
			// that was never set up): create it, then retry as usual.
			// Nothing can have landed.
			if eerr := p.ensure(ctx); eerr != nil {
				return fmt.Errorf("publish %s: %w (and %w)", id, err, eerr)
			}
			return fmt.Errorf("publish %s: %w", id, err)
		}
		var apiErr *jetstream.APIError
		if !errors.As(err, &apiErr) {
			// Timeout or lost connection: the message may have been
			// stored. Check before the next attempt.
			p.uncertain = e.Seq
		}
		return fmt.Errorf("publish %s: %w", id, err)
	}
	p.uncertain = 0
	first := p.tried != e.Seq
	p.tried = e.Seq
	if ack.Duplicate && first && p.spool.OwnEvent(e.Seq) {
		p.foreign.Add(1)
		p.log.Error().Str("id", id).Str("subject", subject).
			Msg("JetStream already held this alert id, which this daemon never sent: another client published under it; the real event was dropped")
		if p.opts.OnForeign != nil {
			p.opts.OnForeign(e.Event)
		}
	}
	if ack.Duplicate {
		p.duplicates.Add(1)
	} else {
		p.published.Add(1)
	}
	p.log.Debug().Str("id", id).Uint64("stream_seq", ack.Sequence).Bool("duplicate", ack.Duplicate).Msg("alert delivered")
	return nil
}

// landed reports whether the last message on subject carries the
// de-duplication id id. The drainer sends one event at a time, oldest first,
// so an uncertain event that landed is the last message on its subject.
func (p *Publisher) landed(ctx context.Context, subject, id string) (bool, error) {
	rctx, cancel := context.WithTimeout(ctx, p.opts.RequestTimeout)
	defer cancel()
	st, err := p.js.Stream(rctx, p.opts.Streams.Alerts)
	if errors.Is(err, jetstream.ErrStreamNotFound) {
		return false, nil // the publish that follows sets the stream up
	}
	if err != nil {
		return false, fmt.Errorf("look up %s: %w", id, err)
	}
	m, err := st.GetLastMsgForSubject(rctx, subject)
	if errors.Is(err, jetstream.ErrMsgNotFound) {
		return false, nil
	}
	if err != nil {
		return false, fmt.Errorf("look up %s: %w", id, err)
	}
	return m.Header.Get(jetstream.MsgIDHeader) == id, nil
}

func (p *Publisher) ensure(ctx context.Context) error {
	rctx, cancel := context.WithTimeout(ctx, 2*p.opts.RequestTimeout)
	defer cancel()
	return EnsureStreams(rctx, p.js, p.opts.Streams)
}

// noteFailure logs the first failure of an episode as a warning and the
// rest at debug level, so an outage costs one warning line, not one per try.
func (p *Publisher) noteFailure(err error, what string) {
	if !p.failing {
		p.failing = true
		p.log.Warn().Err(err).Str("id", what).Int("pending", p.spool.Depth()).
			Msg("alert delivery failing; alerts are kept in the spool and retried in order")
		return
	}
	p.log.Debug().Err(err).Str("id", what).Msg("alert delivery retry failed")
}

// Close stops Run (which makes its final, time-limited drain), waits for it
// and releases the spool. Events not yet delivered stay on disk.
func (p *Publisher) Close() error {
	p.mu.Lock()
	if p.closed {
		p.mu.Unlock()
		return nil
	}
	p.closed = true
	stop, done := p.stop, p.runDone
	p.mu.Unlock()
	if stop != nil {
		stop()
		<-done
	}
	if p.spool == nil {
		return nil
	}
	return p.spool.Close()
}
