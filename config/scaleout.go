package config

import (
	"time"
)

// Roles of a trapline process.
const (
	// RoleAll reads the configured streams and analyses them in one process
	// (the single-node daemon).
	RoleAll = "all"
	// RoleEdge only reads the configured streams and publishes their samples
	// to the NATS cluster in batches.
	RoleEdge = "edge"
	// RoleWorker analyses the streams of the partitions it owns, read from
	// the cluster's samples stream.
	RoleWorker = "worker"
)

// ScaleOut configures the edge and worker roles on a NATS cluster (see
// docs/scaleout.md). It is not used by role all.
type ScaleOut struct {
	// Partitions is the number of partitions of the samples stream. It is
	// permanent: changing it later splits streams differently from the
	// stored samples and the durable state. Choose it at least the largest
	// number of workers expected.
	Partitions int `mapstructure:"partitions"`
	// Replicas of the samples stream and of the key-value buckets; 0 means
	// 3 on a cluster (1 on a single server).
	Replicas int `mapstructure:"replicas"`
	// SamplesMaxAge is how long samples stay in the samples stream. It must
	// cover the warm-up and a takeover.
	SamplesMaxAge time.Duration `mapstructure:"samples_max_age"`
	// Batch is the stretch of samples an edge gathers per message.
	Batch time.Duration `mapstructure:"batch"`
	// WorkerID names this worker among the members; empty means host name
	// and process id.
	WorkerID string `mapstructure:"worker_id"`
	// Heartbeat is how often a worker renews its membership.
	Heartbeat time.Duration `mapstructure:"heartbeat"`
	// MemberTTL is how long a worker stays a member after its last
	// heartbeat; its partitions move to the others after that.
	MemberTTL time.Duration `mapstructure:"member_ttl"`
	// Checkpoint is how often a worker writes a stream's alarm state when
	// no alert changed it.
	Checkpoint time.Duration `mapstructure:"checkpoint"`
	// EdgeBuffer bounds the bytes of samples an edge holds until JetStream
	// acknowledges them. When it is full, a source that can wait (file,
	// stdin, TCP) is made to wait; other sources drop and count.
	EdgeBuffer Size `mapstructure:"edge_buffer"`
	// PartitionBytesPerS is the expected sample bytes per second of one
	// partition; with partitions and samples_max_age it sizes the byte cap
	// of the samples stream.
	PartitionBytesPerS Size `mapstructure:"partition_bytes_per_s"`
	// SamplesMaxBytes caps the samples stream; 0 derives it as partitions ×
	// partition_bytes_per_s × samples_max_age (at most half the account's
	// store, leaving room for alerts and breaths).
	SamplesMaxBytes Size `mapstructure:"samples_max_bytes"`
	// StateExpiry is how long the state of a stream that sends nothing is
	// kept before a worker removes it.
	StateExpiry time.Duration `mapstructure:"state_expiry"`
	// Warmup is the stretch of samples before its checkpoint that a new
	// owner replays to rebuild a stream's analysis state.
	Warmup time.Duration `mapstructure:"warmup"`
}

// defaultScaleOut are the defaults of the scaleout section.
func defaultScaleOut() ScaleOut {
	return ScaleOut{
		Partitions:    16,
		Replicas:      0,
		SamplesMaxAge: 15 * time.Minute,
		Batch:         50 * time.Millisecond,
		Heartbeat:     time.Second,
		MemberTTL:     5 * time.Second,
		Checkpoint:    2 * time.Second,
		Warmup:        3 * time.Minute,
		// 32 MiB holds 20 s of 200 streams at 100 Hz many times over.
		EdgeBuffer: 32 * MiB,
		// 64 streams at 100 Hz of about 30 bytes a sample (framing and
		// JetStream's per-message overhead included).
		PartitionBytesPerS: 192 * KiB,
		StateExpiry:        24 * time.Hour,
	}
}

// validateScaleOut checks the role and the scaleout section.
func (c *Config) validateScaleOut(p *problems) {
	oneOf(p, "role", c.Role, RoleAll, RoleEdge, RoleWorker)
	s := &c.ScaleOut
	if s.Partitions < 1 || s.Partitions > 1024 {
		p.addf("scaleout.partitions", "%d is out of range (want 1 to 1024)", s.Partitions)
	}
	if s.Replicas < 0 || s.Replicas > 5 {
		p.addf("scaleout.replicas", "%d is out of range (want 0 for automatic, or 1 to 5)", s.Replicas)
	}
	durationIn(p, "scaleout.batch", s.Batch, 5*time.Millisecond, time.Second)
	durationIn(p, "scaleout.heartbeat", s.Heartbeat, 100*time.Millisecond, time.Minute)
	durationIn(p, "scaleout.member_ttl", s.MemberTTL, 2*s.Heartbeat, 10*time.Minute)
	durationIn(p, "scaleout.checkpoint", s.Checkpoint, 100*time.Millisecond, 10*time.Minute)
	durationIn(p, "scaleout.warmup", s.Warmup, 0, time.Hour)
	if s.EdgeBuffer < MiB {
		p.addf("scaleout.edge_buffer", "%d bytes is too small (want at least 1MiB)", s.EdgeBuffer)
	}
	if s.PartitionBytesPerS < KiB {
		p.addf("scaleout.partition_bytes_per_s", "%d is too small (want at least 1KiB)", s.PartitionBytesPerS)
	}
	if s.SamplesMaxBytes != 0 && s.SamplesMaxBytes < 64*MiB {
		p.addf("scaleout.samples_max_bytes", "%d is too small (want 0 for derived, or at least 64MiB)", s.SamplesMaxBytes)
	}
	durationIn(p, "scaleout.state_expiry", s.StateExpiry, time.Minute, 365*24*time.Hour)
	durationIn(p, "scaleout.samples_max_age", s.SamplesMaxAge, s.Warmup+s.Checkpoint+time.Minute, 7*24*time.Hour)
	for _, r := range s.WorkerID {
		if !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '-' || r == '_') {
			p.addf("scaleout.worker_id", "%q: want letters, digits, '-' or '_'", s.WorkerID)
			break
		}
	}
}
