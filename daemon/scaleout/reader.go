package scaleout

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"trapline/ingest/backoff"
)

// Timings of a partition reader. A consumer lost with its node is noticed
// after two missed heartbeats (1 s), and made again with a request bounded
// by createTimeout and retried quickly: a JetStream meta leader is elected
// again in about a second, so a short request that fails is cheaper than a
// long one that waits for an answer that will never come.
const (
	readerHeartbeat     = 500 * time.Millisecond
	readerExpiry        = 5 * time.Second
	readerCreateTimeout = 2 * time.Second
	readerRetryMin      = 100 * time.Millisecond
	readerRetryMax      = time.Second
	// readerInactive removes a consumer this reader gave up on (its node
	// came back, its client did not) without a delete request that would
	// only slow the recovery down.
	readerInactive = 15 * time.Second
	readerBatch    = 512
)

// partReader reads one partition of the samples stream in stream order,
// each message once, from an ephemeral consumer it makes again from the
// next sequence whenever the consumer fails, goes silent, or skips a
// delivery (a message lost in flight while the connection moved to
// another node). It does for the partition what an ordered consumer does,
// with the short timeouts a node loss calls for.
type partReader struct {
	js      jetstream.JetStream
	stream  string
	subject string
	start   time.Time // zero: from the first message
	log     zerolog.Logger

	next    uint64 // stream sequence to read from (0: not begun)
	deliver uint64 // consumer sequence of the last message read
	resets  int
}

// run delivers the partition's messages to out until ctx ends.
func (r *partReader) run(ctx context.Context, out chan<- jetstream.Msg) {
	b := backoff.Backoff{Min: readerRetryMin, Max: readerRetryMax, Jitter: 0.2}
	failing := false
	for ctx.Err() == nil {
		err := r.once(ctx, out)
		if ctx.Err() != nil {
			return
		}
		r.resets++
		if !failing {
			failing = true
			r.log.Warn().Err(err).Uint64("from_seq", r.next).Msg("partition consumer lost; making it again")
		}
		if errors.Is(err, errReaderProgress) {
			failing = false
			b.Reset()
			continue // it read before it failed: try again at once
		}
		if !b.Wait(ctx) {
			return
		}
	}
}

// errReaderProgress marks a consumer that failed after it had delivered.
var errReaderProgress = errors.New("consumer failed after delivering")

// once makes a consumer from r.next and reads it until it fails.
func (r *partReader) once(ctx context.Context, out chan<- jetstream.Msg) error {
	cfg := jetstream.ConsumerConfig{
		FilterSubject: r.subject, AckPolicy: jetstream.AckNonePolicy, MemoryStorage: true, Replicas: 1,
		InactiveThreshold: readerInactive, DeliverPolicy: jetstream.DeliverAllPolicy,
	}
	switch {
	case r.next > 0:
		cfg.DeliverPolicy, cfg.OptStartSeq = jetstream.DeliverByStartSequencePolicy, r.next
	case !r.start.IsZero():
		t := r.start
		cfg.DeliverPolicy, cfg.OptStartTime = jetstream.DeliverByStartTimePolicy, &t
	}
	cctx, cancel := context.WithTimeout(ctx, readerCreateTimeout)
	cons, err := r.js.CreateConsumer(cctx, r.stream, cfg)
	cancel()
	if err != nil {
		return fmt.Errorf("make consumer: %w", err)
	}
	it, err := cons.Messages(jetstream.PullMaxMessages(readerBatch), jetstream.PullExpiry(readerExpiry),
		jetstream.PullHeartbeat(readerHeartbeat), jetstream.WithMessagesErrOnMissingHeartbeat(true))
	if err != nil {
		return fmt.Errorf("consume: %w", err)
	}
	// Next has no context; stopping the iterator is what ends it.
	stop := context.AfterFunc(ctx, it.Stop)
	defer stop()
	defer it.Stop()
	r.deliver = 0
	progress := false
	for {
		m, err := it.Next()
		if err != nil {
			if progress {
				return fmt.Errorf("%w: %w", errReaderProgress, err)
			}
			return err
		}
		meta, err := m.Metadata()
		if err != nil {
			continue // not a stream message
		}
		if meta.Sequence.Consumer != r.deliver+1 {
			err := fmt.Errorf("delivery %d after %d: a message was lost in flight", meta.Sequence.Consumer, r.deliver)
			if progress {
				return fmt.Errorf("%w: %w", errReaderProgress, err)
			}
			return err
		}
		r.deliver = meta.Sequence.Consumer
		r.next = meta.Sequence.Stream + 1
		progress = true
		select {
		case out <- m:
		case <-ctx.Done():
			return ctx.Err()
		}
	}
}
