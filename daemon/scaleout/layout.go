package scaleout

import (
	"context"
	"errors"
	"fmt"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/config"
)

// scaleNames are the JetStream names and subjects of the scale-out roles,
// all derived from the subject prefix.
type scaleNames struct {
	prefix  string // subject prefix
	samples string // samples stream
	members string // membership bucket
	state   string // per-stream state bucket
}

func newScaleNames(prefix string) scaleNames {
	if prefix == "" {
		prefix = alerts.DefaultPrefix
	}
	base := strings.NewReplacer(".", "_", "-", "_").Replace(strings.ToUpper(prefix))
	return scaleNames{prefix: prefix, samples: base + "_SAMPLES", members: base + "_MEMBERS", state: base + "_STATE"}
}

// subj builds the subjects under the prefix.
func (n scaleNames) subj() alerts.Subjects { return alerts.Subjects{Prefix: n.prefix} }

// inSubject is what edges publish on: <prefix>.samples.<stream>.
func (n scaleNames) inSubject() string { return n.subj().Each(alerts.KindSamples) }

// partSubject is the stored subject of partition p (p < 0: every
// partition): <prefix>.samples.<p>.<stream>. The stream's subject transform
// puts every sample message there.
func (n scaleNames) partSubject(p int) string { return n.subj().SamplesPartition(p) }

// partOf reads the partition and the stream id from a stored subject.
func (n scaleNames) partOf(subject string) (int, string, bool) { return n.subj().PartitionOf(subject) }

// samplesStreamConfig is the samples stream: every edge message, moved by a
// subject transform to a partition chosen by a deterministic hash of the
// stream id (the server's partition function), kept for a short time.
func samplesStreamConfig(n scaleNames, so *config.ScaleOut, replicas int) jetstream.StreamConfig {
	// Asynchronous persistence is faster but the server refuses it on a
	// replicated stream (where the replicas are the safety).
	persist := jetstream.DefaultPersistMode
	if replicas == 1 {
		persist = jetstream.AsyncPersistMode
	}
	return jetstream.StreamConfig{
		Name:        n.samples,
		Description: "trapline samples from edge ingesters, partitioned by stream id",
		Subjects:    []string{n.inSubject()},
		SubjectTransform: &jetstream.SubjectTransformConfig{
			Source:      n.inSubject(),
			Destination: n.subj().SamplesPartitionTransform(so.Partitions),
		},
		Retention:   jetstream.LimitsPolicy,
		Discard:     jetstream.DiscardOld,
		MaxAge:      so.SamplesMaxAge,
		Storage:     jetstream.FileStorage,
		Replicas:    replicas,
		Duplicates:  samplesDedupe(so),
		PersistMode: persist,
	}
}

// samplesDedupe is the de-duplication window of the samples stream: an edge
// retries a message with the same id for this long (less one publish
// timeout). Two minutes ride through a leader election (4 to 9 s in
// nats-server) and a hang of a node many times over.
func samplesDedupe(so *config.ScaleOut) time.Duration { return min(2*time.Minute, so.SamplesMaxAge) }

// scaleReplicas is the replica count of the scale-out streams and buckets:
// the configured one, or 3 when the server is part of a cluster and 1
// otherwise.
func scaleReplicas(nc *nats.Conn, so *config.ScaleOut) int {
	if so.Replicas > 0 {
		return so.Replicas
	}
	if nc.ConnectedClusterName() != "" {
		return 3
	}
	return 1
}

// retry calls f until it succeeds, ctx ends or a minute passes, with short
// attempts (3 s) and pauses (0.3 s); failures are logged as what. A cluster
// that has just started may have no JetStream leader for some seconds, and
// when two workers create the same stream at once the server may answer
// only one of them: the other's next attempt finds the stream made.
func retry(ctx context.Context, log zerolog.Logger, what string, f func(context.Context) error) error {
	end := time.Now().Add(time.Minute)
	for {
		cctx, cancel := context.WithTimeout(ctx, 3*time.Second)
		err := f(cctx)
		cancel()
		if err == nil {
			return nil
		}
		var perm permanentError
		if ctx.Err() != nil || time.Now().After(end) || errors.As(err, &perm) {
			return err
		}
		log.Warn().Err(err).Msgf("%s not ready; retrying", what)
		t := time.NewTimer(300 * time.Millisecond)
		select {
		case <-ctx.Done():
			t.Stop()
			return err
		case <-t.C:
		}
	}
}

// ensureSamplesStream creates or updates the samples stream. A stream that
// exists with another partition count is refused: the count is permanent.
func ensureSamplesStream(ctx context.Context, js jetstream.JetStream, n scaleNames, so *config.ScaleOut, replicas int, log zerolog.Logger) error {
	want := samplesStreamConfig(n, so, replicas)
	return retry(ctx, log, "samples stream", func(ctx context.Context) error {
		s, err := js.Stream(ctx, n.samples)
		if errors.Is(err, jetstream.ErrStreamNotFound) {
			_, err = js.CreateStream(ctx, want)
			if err == nil {
				log.Info().Str("stream", n.samples).Int("partitions", so.Partitions).Int("replicas", replicas).Msg("samples stream created")
			}
			return err
		}
		if err != nil {
			return err
		}
		have := s.CachedInfo().Config
		if have.SubjectTransform != nil && have.SubjectTransform.Destination != want.SubjectTransform.Destination {
			return permanentError{fmt.Errorf("samples stream %s partitions as %q, configured %q: scaleout.partitions is permanent; "+
				"put the old value back, or delete the stream (its samples are short-lived)", n.samples,
				have.SubjectTransform.Destination, want.SubjectTransform.Destination)}
		}
		// Replicas and ages may change; keep the rest as it is.
		have.MaxAge, have.Replicas, have.Duplicates = want.MaxAge, want.Replicas, want.Duplicates
		_, err = js.UpdateStream(ctx, have)
		return err
	})
}

// permanentError is a failure that retrying cannot mend.
type permanentError struct{ error }

func (e permanentError) Unwrap() error { return e.error }
