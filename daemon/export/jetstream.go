package export

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"trapline/alerts"
)

// JetStreamOptions choose what JetStream reads.
type JetStreamOptions struct {
	// Streams names the JetStream streams and the subject prefix, as the
	// daemon's configuration does (config.Config.JetStream()).
	Streams alerts.StreamsConfig
	// Stream keeps one stream id's records; empty reads all.
	Stream string
	// From starts the reading at the first message stored at or after it
	// (zero: the first message kept); To stops it before the first message
	// stored at or after it (zero: the last message stored when the read
	// began). Times are JetStream's store times, the wall time of
	// publication, so they bound breath records too.
	From, To time.Time
	// Wait bounds the wait for each message; default 5 s.
	Wait time.Duration
}

// JetStream yields the breath records and then the alert events kept in
// the daemon's JetStream streams, read with ephemeral ordered consumers
// (which the server removes once they are idle). Messages that are not
// records are skipped.
func JetStream(ctx context.Context, js jetstream.JetStream, opts JetStreamOptions) Records {
	cfg := opts.Streams.WithDefaults()
	subjects := alerts.Subjects{Prefix: cfg.Prefix}
	if opts.Wait <= 0 {
		opts.Wait = 5 * time.Second
	}
	return func(yield func(Record, error) bool) {
		for _, k := range Kinds {
			name, kind := cfg.Breaths, alerts.KindBreath
			if k == KindAlert {
				name, kind = cfg.Alerts, alerts.KindAlert
			}
			subject := subjects.All(kind)
			if opts.Stream != "" {
				subject = subjects.Subject(kind, opts.Stream)
			}
			if !readStream(ctx, js, name, subject, opts, yield) {
				return
			}
		}
	}
}

// readStream yields the records of one JetStream stream; false means stop.
func readStream(ctx context.Context, js jetstream.JetStream, name, subject string, opts JetStreamOptions, yield func(Record, error) bool) bool {
	st, err := js.Stream(ctx, name)
	if err != nil {
		return yield(Record{}, fmt.Errorf("jetstream stream %s: %w", name, err))
	}
	cc := jetstream.OrderedConsumerConfig{FilterSubjects: []string{subject}}
	if !opts.From.IsZero() {
		from := opts.From
		cc.DeliverPolicy, cc.OptStartTime = jetstream.DeliverByStartTimePolicy, &from
	}
	cons, err := st.OrderedConsumer(ctx, cc)
	if err != nil {
		return yield(Record{}, fmt.Errorf("jetstream stream %s: %w", name, err))
	}
	if cons.CachedInfo().NumPending == 0 {
		return true
	}
	for {
		wctx, cancel := context.WithTimeout(ctx, opts.Wait)
		msg, err := cons.Next(jetstream.FetchContext(wctx))
		cancel()
		if err != nil {
			if ctx.Err() != nil {
				return yield(Record{}, ctx.Err())
			}
			if errors.Is(err, context.DeadlineExceeded) || errors.Is(err, jetstream.ErrNoMessages) {
				return true // the last message was deleted meanwhile
			}
			return yield(Record{}, fmt.Errorf("jetstream stream %s: %w", name, err))
		}
		meta, err := msg.Metadata()
		if err != nil {
			return yield(Record{}, fmt.Errorf("jetstream stream %s: %w", name, err))
		}
		if !opts.To.IsZero() && !meta.Timestamp.Before(opts.To) {
			return true
		}
		if rec, err := ParseRecord(msg.Data()); err == nil && !yield(rec, nil) {
			return false
		}
		if meta.NumPending == 0 {
			return true
		}
	}
}
