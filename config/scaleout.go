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
		MemberTTL:     4 * time.Second,
		Checkpoint:    2 * time.Second,
		Warmup:        3 * time.Minute,
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
	durationIn(p, "scaleout.samples_max_age", s.SamplesMaxAge, s.Warmup+s.Checkpoint+time.Minute, 7*24*time.Hour)
	for _, r := range s.WorkerID {
		if !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '-' || r == '_') {
			p.addf("scaleout.worker_id", "%q: want letters, digits, '-' or '_'", s.WorkerID)
			break
		}
	}
}
