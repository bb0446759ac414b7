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

// scaleReplicas is the one replica count of every stream and bucket of
// the scale-out roles (samples, alerts, breaths, members, state):
// scaleout.replicas, or 3 when the server is part of a cluster and 1
// otherwise. nats.replicas (role all) is not used by these roles, so that
// a worker without replica settings cannot weaken an R3 cluster.
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
			return createSamplesStream(ctx, js, want, so, log)
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
		if have.Replicas > want.Replicas {
			return lowerReplicasError(n.samples, have.Replicas, want.Replicas)
		}
		// Replicas (up), ages and a configured cap may change; keep the rest
		// as it is (a derived cap stays as it was fitted at creation).
		next := have
		next.MaxAge, next.Replicas, next.Duplicates = want.MaxAge, want.Replicas, want.Duplicates
		if so.SamplesMaxBytes > 0 {
			next.MaxBytes = int64(so.SamplesMaxBytes)
		}
		if next.MaxAge == have.MaxAge && next.Replicas == have.Replicas && next.Duplicates == have.Duplicates && next.MaxBytes == have.MaxBytes {
			return nil // an update would only ask the store for its reservation again
		}
		have = next
		_, err = js.UpdateStream(ctx, have)
		return err
	})
}

// createSamplesStream creates the samples stream with its byte cap:
// scaleout.samples_max_bytes, or partitions × partition_bytes_per_s ×
// samples_max_age. JetStream reserves a stream's cap in the store at
// placement; when the store cannot hold a derived cap, it is halved until
// it fits, and then halved once more, so that the samples take at most
// half of what was free and leave the rest to the alerts and breaths.
func createSamplesStream(ctx context.Context, js jetstream.JetStream, want jetstream.StreamConfig, so *config.ScaleOut, log zerolog.Logger) error {
	want.MaxBytes = int64(so.SamplesMaxBytes)
	derived := want.MaxBytes == 0
	if derived {
		want.MaxBytes = int64(so.Partitions) * int64(so.PartitionBytesPerS) * int64(so.SamplesMaxAge/time.Second)
	}
	fitted := false
	for {
		_, err := js.CreateStream(ctx, want)
		var apiErr *jetstream.APIError
		if derived && errors.As(err, &apiErr) && strings.Contains(apiErr.Description, "insufficient") && want.MaxBytes/2 >= minSamplesBytes {
			want.MaxBytes /= 2
			fitted = true
			continue
		}
		if err != nil {
			return err
		}
		break
	}
	if fitted && want.MaxBytes/2 >= minSamplesBytes {
		want.MaxBytes /= 2
		if _, err := js.UpdateStream(ctx, want); err != nil {
			return err
		}
	}
	log.Info().Str("stream", want.Name).Int("partitions", so.Partitions).Int("replicas", want.Replicas).
		Int64("max_bytes", want.MaxBytes).Bool("fitted_to_store", fitted).Msg("samples stream created")
	return nil
}

// minSamplesBytes is the smallest derived cap of the samples stream.
const minSamplesBytes = 64 << 20

// checkReplicas refuses to lower the replicas of an existing stream (a
// bucket is the stream KV_<bucket>); a stream not found passes.
func checkReplicas(ctx context.Context, js jetstream.JetStream, stream string, want int) error {
	s, err := js.Stream(ctx, stream)
	if errors.Is(err, jetstream.ErrStreamNotFound) {
		return nil
	}
	if err != nil {
		return err
	}
	if have := s.CachedInfo().Config.Replicas; have > want {
		return lowerReplicasError(stream, have, want)
	}
	return nil
}

// lowerReplicasError explains why a role will not start.
func lowerReplicasError(stream string, have, want int) error {
	return permanentError{fmt.Errorf("stream %s has %d replicas and this process would set %d: refusing to lower them "+
		"(set scaleout.replicas: %d, or 0 for automatic on a cluster; lower them by hand with the nats tool if that is meant)",
		stream, have, want, have)}
}

// permanentError is a failure that retrying cannot mend.
type permanentError struct{ error }

func (e permanentError) Unwrap() error { return e.error }
