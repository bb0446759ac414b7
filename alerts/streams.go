package alerts

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

// DefaultPrefix is the first token of every trapline subject.
const DefaultPrefix = "trapline"

// Subject kinds: the second token of a trapline subject.
const (
	KindBreath  = "breath"
	KindAlert   = "alert"
	KindStatus  = "status"
	KindSamples = "samples"
	KindAck     = "ack"
)

// Defaults of the JetStream streams. The de-duplication window must cover the
// longest gap between a publish that may have landed (its ack was lost) and
// its retry: the publisher retries within seconds while the connection is up,
// and after an outage it first looks for the event at the end of the stream,
// so ten minutes leaves a wide margin; it must not exceed MaxAge.
const (
	DefaultAlertsDuplicates = 10 * time.Minute
	DefaultAlertsMaxAge     = 30 * 24 * time.Hour
	DefaultAlertsMaxBytes   = -1 // no cap of its own: alerts are small and precious
	DefaultBreathsMaxAge    = 24 * time.Hour
	DefaultBreathsMaxBytes  = 512 << 20
)

// Subjects builds trapline subjects (`<prefix>.<kind>.<stream>`) under one
// prefix.
type Subjects struct {
	Prefix string
}

// Subject returns `<prefix>.<kind>.<stream>`; the stream id goes through
// SubjectToken so that any id makes a valid, single-token subject.
func (s Subjects) Subject(kind, stream string) string {
	return s.prefix() + "." + kind + "." + SubjectToken(stream)
}

// Alert returns the alert subject of a stream.
func (s Subjects) Alert(stream string) string { return s.Subject(KindAlert, stream) }

// Breath returns the breath record subject of a stream.
func (s Subjects) Breath(stream string) string { return s.Subject(KindBreath, stream) }

// Status returns the status heartbeat subject of a stream.
func (s Subjects) Status(stream string) string { return s.Subject(KindStatus, stream) }

// Samples returns the raw sample subject of a stream (scale-out ingest).
func (s Subjects) Samples(stream string) string { return s.Subject(KindSamples, stream) }

// Ack returns the subject on which acknowledgements of a stream's alerts are
// requested.
func (s Subjects) Ack(stream string) string { return s.Subject(KindAck, stream) }

// All returns the wildcard subject for one kind over every stream
// (`<prefix>.<kind>.>`).
func (s Subjects) All(kind string) string { return s.prefix() + "." + kind + ".>" }

// Each returns the wildcard subject for one kind, one token per stream
// (`<prefix>.<kind>.*`): what the edges of the scale-out publish on.
func (s Subjects) Each(kind string) string { return s.prefix() + "." + kind + ".*" }

// SamplesPartition returns the stored subject of scale-out partition p,
// `<prefix>.samples.<p>.*`, or of every partition when p < 0.
func (s Subjects) SamplesPartition(p int) string {
	if p < 0 {
		return s.prefix() + "." + KindSamples + ".*.*"
	}
	return s.prefix() + "." + KindSamples + "." + strconv.Itoa(p) + ".*"
}

// SamplesPartitionTransform is the destination of the samples stream's
// subject transform: the server's deterministic partition function of the
// stream id over n partitions.
func (s Subjects) SamplesPartitionTransform(n int) string {
	return fmt.Sprintf("%s.%s.{{partition(%d,1)}}.{{wildcard(1)}}", s.prefix(), KindSamples, n)
}

// PartitionOf reads the partition and the stream id from a stored samples
// subject.
func (s Subjects) PartitionOf(subject string) (int, string, bool) {
	rest, ok := strings.CutPrefix(subject, s.prefix()+"."+KindSamples+".")
	if !ok {
		return 0, "", false
	}
	ps, stream, ok := strings.Cut(rest, ".")
	if !ok {
		return 0, "", false
	}
	p, err := strconv.Atoi(ps)
	return p, stream, err == nil
}

func (s Subjects) prefix() string {
	if s.Prefix == "" {
		return DefaultPrefix
	}
	return s.Prefix
}

// SubjectToken maps a stream id to one NATS subject token: characters that
// NATS gives a meaning ('.', '*', '>') and white space or control characters
// become '_'; an empty id becomes "_". Ids made of letters, digits, '-' and
// '_' (the recommended form) pass unchanged.
func SubjectToken(id string) string {
	if id == "" {
		return "_"
	}
	ok := true
	for _, r := range id {
		if r == '.' || r == '*' || r == '>' || r <= ' ' || r == 0x7f {
			ok = false
			break
		}
	}
	if ok {
		return id
	}
	return strings.Map(func(r rune) rune {
		if r == '.' || r == '*' || r == '>' || r <= ' ' || r == 0x7f {
			return '_'
		}
		return r
	}, id)
}

// ValidatePrefix checks a subject prefix: one or more dot-separated tokens,
// none empty, no wildcards or white space.
func ValidatePrefix(prefix string) error {
	if prefix == "" {
		return errors.New("subject prefix is empty")
	}
	for _, tok := range strings.Split(prefix, ".") {
		if tok == "" {
			return fmt.Errorf("subject prefix %q: empty token", prefix)
		}
		if SubjectToken(tok) != tok {
			return fmt.Errorf("subject prefix %q: token %q holds a wildcard, a dot or white space", prefix, tok)
		}
	}
	return nil
}

// StreamsConfig describes the JetStream streams trapline keeps. Zero values
// take the defaults (see WithDefaults); a negative MaxAge or MaxBytes means
// no limit. JetStream reserves a stream's MaxBytes from the server's store
// limit when the stream is created, so capped streams must fit in it.
type StreamsConfig struct {
	// Prefix is the subject prefix (DefaultPrefix when empty).
	Prefix string
	// Alerts and Breaths are the stream names; by default the prefix in
	// upper case with '.' and '-' turned into '_', plus _ALERTS or _BREATHS.
	Alerts  string
	Breaths string
	// AlertsDuplicates is the de-duplication window of the alerts stream.
	AlertsDuplicates time.Duration
	// AlertsMaxAge and AlertsMaxBytes limit the alerts stream; the oldest
	// alerts go first.
	AlertsMaxAge   time.Duration
	AlertsMaxBytes int64
	// BreathsMaxAge and BreathsMaxBytes limit the breaths stream.
	BreathsMaxAge   time.Duration
	BreathsMaxBytes int64
	// Replicas is the number of copies of each stream (1 on a single
	// server, 3 on a cluster).
	Replicas int
}

// WithDefaults returns c with every zero field set to its default.
func (c StreamsConfig) WithDefaults() StreamsConfig {
	if c.Prefix == "" {
		c.Prefix = DefaultPrefix
	}
	base := strings.NewReplacer(".", "_", "-", "_").Replace(strings.ToUpper(c.Prefix))
	if c.Alerts == "" {
		c.Alerts = base + "_ALERTS"
	}
	if c.Breaths == "" {
		c.Breaths = base + "_BREATHS"
	}
	if c.AlertsDuplicates == 0 {
		c.AlertsDuplicates = DefaultAlertsDuplicates
	}
	if c.AlertsMaxAge == 0 {
		c.AlertsMaxAge = DefaultAlertsMaxAge
	}
	if c.AlertsMaxBytes == 0 {
		c.AlertsMaxBytes = DefaultAlertsMaxBytes
	}
	if c.BreathsMaxAge == 0 {
		c.BreathsMaxAge = DefaultBreathsMaxAge
	}
	if c.BreathsMaxBytes == 0 {
		c.BreathsMaxBytes = DefaultBreathsMaxBytes
	}
	if c.Replicas == 0 {
		c.Replicas = 1
	}
	return c
}

// Validate reports every problem of a (defaulted) configuration at once.
func (c StreamsConfig) Validate() error {
	var errs []error
	if err := ValidatePrefix(c.Prefix); err != nil {
		errs = append(errs, err)
	}
	for _, n := range []string{c.Alerts, c.Breaths} {
		if n == "" || strings.ContainsAny(n, ". *>/\\\t\r\n") {
			errs = append(errs, fmt.Errorf("stream name %q: want letters, digits, '-' or '_'", n))
		}
	}
	if c.Alerts == c.Breaths {
		errs = append(errs, fmt.Errorf("alerts and breaths streams share the name %q", c.Alerts))
	}
	if c.AlertsDuplicates <= 0 {
		errs = append(errs, fmt.Errorf("alerts de-duplication window %v: want > 0", c.AlertsDuplicates))
	}
	if c.AlertsMaxAge > 0 && c.AlertsDuplicates > c.AlertsMaxAge {
		errs = append(errs, fmt.Errorf("alerts de-duplication window %v exceeds max age %v", c.AlertsDuplicates, c.AlertsMaxAge))
	}
	if c.Replicas < 1 || c.Replicas > 5 {
		errs = append(errs, fmt.Errorf("stream replicas %d: want 1 to 5", c.Replicas))
	}
	return errors.Join(errs...)
}

// AlertsStreamConfig returns the JetStream configuration of the alerts
// stream: file storage, the de-duplication window, age and size limits.
func (c StreamsConfig) AlertsStreamConfig() jetstream.StreamConfig {
	c = c.WithDefaults()
	return jetstream.StreamConfig{
		Name:        c.Alerts,
		Description: "trapline alert events (one message per state change, de-duplicated by alert id and state)",
		Subjects:    []string{Subjects{c.Prefix}.All(KindAlert)},
		Storage:     jetstream.FileStorage,
		Retention:   jetstream.LimitsPolicy,
		Discard:     jetstream.DiscardOld,
		MaxAge:      jsMaxAge(c.AlertsMaxAge),
		MaxBytes:    jsMaxBytes(c.AlertsMaxBytes),
		Duplicates:  c.AlertsDuplicates,
		Replicas:    c.Replicas,
	}
}

// BreathsStreamConfig returns the JetStream configuration of the breaths
// stream: file storage, age and size limits. On a single server it is
// flushed asynchronously (a breath lost in a power cut is acceptable, the
// alerts are not); JetStream refuses that mode on replicated streams, whose
// copies on other nodes protect the records instead.
func (c StreamsConfig) BreathsStreamConfig() jetstream.StreamConfig {
	c = c.WithDefaults()
	persist := jetstream.DefaultPersistMode
	if c.Replicas == 1 {
		persist = jetstream.AsyncPersistMode
	}
	return jetstream.StreamConfig{
		Name:        c.Breaths,
		Description: "trapline breath records",
		Subjects:    []string{Subjects{c.Prefix}.All(KindBreath)},
		Storage:     jetstream.FileStorage,
		Retention:   jetstream.LimitsPolicy,
		Discard:     jetstream.DiscardOld,
		MaxAge:      jsMaxAge(c.BreathsMaxAge),
		MaxBytes:    jsMaxBytes(c.BreathsMaxBytes),
		Replicas:    c.Replicas,
		PersistMode: persist,
	}
}

// jsMaxAge maps "no limit" (negative) to JetStream's 0.
func jsMaxAge(d time.Duration) time.Duration { return max(d, 0) }

// jsMaxBytes maps "no limit" (negative) to JetStream's -1.
func jsMaxBytes(n int64) int64 {
	if n < 0 {
		return -1
	}
	return n
}

// EnsureStreams creates the alerts and breaths streams, or updates them to
// cfg when they exist. It is safe to call at every start and again whenever
// a publish finds no stream (a server that lost its store).
func EnsureStreams(ctx context.Context, js jetstream.JetStream, cfg StreamsConfig) error {
	cfg = cfg.WithDefaults()
	if err := cfg.Validate(); err != nil {
		return fmt.Errorf("jetstream streams: %w", err)
	}
	for _, sc := range []jetstream.StreamConfig{cfg.AlertsStreamConfig(), cfg.BreathsStreamConfig()} {
		if s, err := js.Stream(ctx, sc.Name); err == nil && sameLimits(s.CachedInfo().Config, sc) {
			// Nothing to change: an update would only ask the servers to
			// reserve the store again (and fail on a nearly full one).
			continue
		}
		if _, err := js.CreateOrUpdateStream(ctx, sc); err != nil {
			return fmt.Errorf("create or update stream %s: %w", sc.Name, err)
		}
	}
	return nil
}

// sameLimits tells whether an existing stream already has what ensure
// would set (a zero de-duplication window is the server's default).
func sameLimits(have, want jetstream.StreamConfig) bool {
	return slices.Equal(have.Subjects, want.Subjects) && have.MaxAge == want.MaxAge && have.MaxBytes == want.MaxBytes &&
		(want.Duplicates == 0 || have.Duplicates == want.Duplicates) && have.Replicas == want.Replicas && have.Storage == want.Storage
}
