package scaleout

import (
	"context"
	"errors"
	"hash/fnv"
	"slices"
	"strconv"
	"sync"
	"time"

	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"
)

// members keeps this worker's membership alive in a key-value bucket and
// tells which workers are alive: every worker puts its id every heartbeat;
// a worker not heard from for member_ttl is gone.
//
// Liveness rides through a leader election of the bucket (nats-server:
// followers wait an election timeout of 4 to 9 s, then campaign for 0.1 to
// 0.8 s): while this worker's own heartbeat fails, the bucket is what is
// away, not the others, so no member expires; once a heartbeat is stored
// again, every member that was live when it began to fail is counted as
// heard at that moment and has member_ttl to be heard again. A worker is always live in its own view.
type members struct {
	kv        jetstream.KeyValue
	id        string
	heartbeat time.Duration
	ttl       time.Duration
	log       zerolog.Logger

	mu      sync.Mutex
	seen    map[string]time.Time // worker id → local time it was last heard
	failing bool                 // this worker's heartbeat is failing
	failed  time.Time            // when the heartbeat began to fail
	back    time.Time            // when the heartbeat was stored again

	// changed receives the sorted live members whenever they change; it
	// holds only the latest view.
	changed chan []string
}

// ensureMembersBucket creates the membership bucket. Its TTL only clears
// keys of workers long gone (liveness is judged by each worker's clock),
// so it is member_ttl plus the longest leader election and a margin: a
// key must not vanish while its worker waits for an election.
func ensureMembersBucket(ctx context.Context, js jetstream.JetStream, name string, ttl time.Duration, replicas int, log zerolog.Logger) (jetstream.KeyValue, error) {
	var kv jetstream.KeyValue
	err := retry(ctx, log, "membership bucket", func(ctx context.Context) error {
		var err error
		if kv, err = js.KeyValue(ctx, name); err == nil {
			return checkReplicas(ctx, js, "KV_"+name, replicas)
		}
		kv, err = js.CreateOrUpdateKeyValue(ctx, jetstream.KeyValueConfig{
			Bucket: name, Description: "trapline workers alive (TTL heartbeats)",
			History: 1, TTL: ttl + electionGrace, Replicas: replicas, Storage: jetstream.FileStorage,
		})
		return err
	})
	return kv, err
}

// electionGrace is the longest a JetStream asset can be without a leader
// after its leader dies: nats-server's largest election timeout (9 s), its
// largest campaign delay (0.8 s) and one heartbeat interval (1 s) of the
// new leader, rounded up.
const electionGrace = 11 * time.Second

func newMembers(kv jetstream.KeyValue, id string, heartbeat, ttl time.Duration, log zerolog.Logger) *members {
	return &members{kv: kv, id: id, heartbeat: heartbeat, ttl: ttl, log: log,
		seen: map[string]time.Time{}, changed: make(chan []string, 1)}
}

// Run heartbeats and watches the bucket until ctx is cancelled, watching
// again when a watch ends (a leader election may end it). A stopped worker
// does not remove its key: its partitions move after member_ttl, as they
// would after a crash, and the others replay from its last checkpoint.
func (m *members) Run(ctx context.Context) error {
	var last []string
	for ctx.Err() == nil {
		err := m.watch(ctx, &last)
		if ctx.Err() != nil {
			break
		}
		m.log.Warn().Err(err).Msg("membership watch ended; watching again")
		t := time.NewTimer(m.heartbeat)
		select {
		case <-ctx.Done():
		case <-t.C:
		}
		t.Stop()
	}
	return nil
}

// watch runs one watch of the bucket until it ends or ctx does.
func (m *members) watch(ctx context.Context, last *[]string) error {
	w, err := m.kv.WatchAll(ctx)
	if err != nil {
		return err
	}
	defer func() { _ = w.Stop() }()
	beat := time.NewTicker(m.heartbeat)
	defer beat.Stop()
	check := time.NewTicker(m.heartbeat / 2)
	defer check.Stop()
	initial := true
	m.put(ctx)
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-beat.C:
			m.put(ctx)
		case e, ok := <-w.Updates():
			if !ok {
				return errors.New("membership watch ended")
			}
			if e == nil {
				initial = false // the stored values have been delivered
				continue
			}
			m.heard(e, initial)
		case <-check.C:
		}
		live := m.live(time.Now())
		if !slices.Equal(live, *last) {
			*last = live
			m.log.Info().Strs("members", live).Msg("workers changed")
			select {
			case <-m.changed:
			default:
			}
			m.changed <- live
		}
	}
}

// heard notes a watched entry.
func (m *members) heard(e jetstream.KeyValueEntry, initial bool) {
	heard := time.Now()
	if initial {
		// A stored value may be old: a worker that died just now.
		if c := e.Created(); c.Before(heard) {
			heard = c
		}
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	if e.Operation() == jetstream.KeyValuePut {
		m.seen[e.Key()] = heard
	} else {
		delete(m.seen, e.Key())
	}
}

// put renews this worker's key. A failure is logged once per episode and
// holds the view (see members); the next beat tries again.
func (m *members) put(ctx context.Context) {
	cctx, cancel := context.WithTimeout(ctx, m.heartbeat)
	defer cancel()
	_, err := m.kv.Put(cctx, m.id, []byte(time.Now().UTC().Format(time.RFC3339Nano)))
	if ctx.Err() != nil {
		return
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	switch {
	case err != nil && !m.failing:
		m.failing, m.failed = true, time.Now()
		m.log.Warn().Err(err).Msg("membership heartbeat failed; holding the view of the members until it is stored again")
	case err == nil && m.failing:
		m.failing, m.back = false, time.Now()
		m.log.Info().Msg("membership heartbeat stored again")
	}
}

// live returns the sorted ids heard from within the TTL, this worker
// always among them, and the last view unchanged while the heartbeat
// fails.
func (m *members) live(now time.Time) []string {
	m.mu.Lock()
	defer m.mu.Unlock()
	out := []string{m.id}
	for id, t := range m.seen {
		if id == m.id {
			continue
		}
		if t.Before(m.back) && m.failed.Sub(t) < m.ttl {
			// Live when the bucket went away: nobody could be heard
			// while it was away, so the TTL counts from its return.
			t = m.back
		}
		if m.failing {
			now = m.failed // the view as it was when the bucket went away
		}
		if now.Sub(t) < m.ttl {
			out = append(out, id)
		}
	}
	slices.Sort(out)
	return out
}

// rendezvousOwner returns the member that owns partition p: the one with
// the highest hash of (member, p) (Thaler and Ravishankar, "A name-based
// mapping scheme for rendezvous", 1996). When a member leaves, only its own
// partitions move, spread over the others.
func rendezvousOwner(p int, live []string) string {
	var best string
	var bestH uint64
	for _, id := range live {
		h := fnv.New64a()
		_, _ = h.Write([]byte(id))
		_, _ = h.Write([]byte{0})
		_, _ = h.Write([]byte(strconv.Itoa(p)))
		// FNV alone mixes the last bytes poorly; finish with a 64-bit mixer
		// (the splitmix64 finaliser, Steele et al. 2014).
		x := h.Sum64()
		x ^= x >> 30
		x *= 0xbf58476d1ce4e5b9
		x ^= x >> 27
		x *= 0x94d049bb133111eb
		x ^= x >> 31
		if best == "" || x > bestH || x == bestH && id < best {
			best, bestH = id, x
		}
	}
	return best
}

// ownedPartitions returns the partitions of n that id owns among live.
func ownedPartitions(id string, live []string, n int) []int {
	var out []int
	for p := range n {
		if rendezvousOwner(p, live) == id {
			out = append(out, p)
		}
	}
	return out
}
