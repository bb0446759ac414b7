package alerts

import (
	"context"
	"fmt"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"trapline/ingest/backoff"
)

// NewDirectPublisher returns a publisher without a spool, for a caller
// whose own log is the durable store (the scale-out worker: the samples
// stream and its checkpoints). It delivers with PublishNow; Publish refuses.
func NewDirectPublisher(nc *nats.Conn, opts PublisherOptions) (*Publisher, error) {
	return newPublisher(nc, nil, opts)
}

// PublishNow sends ev and waits until JetStream acknowledges it, retrying
// with the same de-duplication id (a retry of a publish that had landed is
// dropped by JetStream inside the window) after a capped, jittered pause,
// until ctx ends.
func (p *Publisher) PublishNow(ctx context.Context, ev Event) error {
	data, err := ev.Marshal()
	if err != nil {
		return fmt.Errorf("publish alert: %w", err)
	}
	subject, id := p.subj.Alert(ev.Stream), ev.DedupID()
	b := backoff.Backoff{Min: p.opts.RetryMin, Max: p.opts.RetryMax, Jitter: 0.2}
	for {
		rctx, cancel := context.WithTimeout(ctx, p.opts.RequestTimeout)
		ack, err := p.js.Publish(rctx, subject, data, jetstream.WithMsgID(id), jetstream.WithExpectStream(p.opts.Streams.Alerts))
		cancel()
		if err == nil {
			if ack.Duplicate {
				p.duplicates.Add(1)
			} else {
				p.published.Add(1)
			}
			return nil
		}
		p.retries.Add(1)
		if ctx.Err() != nil {
			return fmt.Errorf("publish alert %s: %w", id, ctx.Err())
		}
		p.log.Warn().Err(err).Str("id", id).Msg("alert publish failed; retrying with the same id")
		if !b.Wait(ctx) {
			return fmt.Errorf("publish alert %s: %w", id, ctx.Err())
		}
	}
}
