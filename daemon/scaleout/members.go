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
// 0.8 s): while this worker cannot see the bucket, the bucket is what is
// away, not the others, so no member expires; once it sees the bucket
// again, every member that was live when it went away is counted as heard
// at that moment and has member_ttl to be heard again. A worker is always
// live in its own view.
//
// Two things hide the bucket. A heartbeat that fails is the plain one. A
// stale watch is the other: a watch served by a node that died delivers
// nothing until it is made again, while heartbeats are stored through the
// new node, and every other worker would seem to expire (each worker then
// claims every partition). This worker's own key is the canary: when its
// stored heartbeats stop coming back through the watch for staleAfter, the
// view is held in the same way and the watch is made again.
type members struct {
	kv        jetstream.KeyValue
	id        string
	heartbeat time.Duration
	ttl       time.Duration
	log       zerolog.Logger

	mu      sync.Mutex
	seen    map[string]time.Time // worker id → local time it was last heard
	failing bool                 // this worker's heartbeat is failing
	blind   bool                 // the watch has gone stale
	awayAt  time.Time            // when the bucket went out of sight (the last episode)
	back    time.Time            // when it came back into sight
	stored  time.Time            // when a heartbeat was last stored
	echoed  time.Time            // when this worker's key last came back through the watch, or the watch began

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

// Run heartbeats and watches the bucket until ctx is cancelled. The
// heartbeat has a goroutine of its own, so that it goes on while a watch is
// being made again (a leader election or a stale watch ends one). A stopped
// worker does not remove its key: its partitions move after member_ttl, as
// they would after a crash, and the others replay from its last checkpoint.
func (m *members) Run(ctx context.Context) error {
	done := make(chan struct{})
	go func() {
		defer close(done)
		m.beat(ctx)
	}()
	defer func() { <-done }()
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

// beat puts this worker's key every heartbeat until ctx ends.
func (m *members) beat(ctx context.Context) {
	t := time.NewTicker(m.heartbeat)
	defer t.Stop()
	for {
		m.put(ctx)
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
	}
}

// watch runs one watch of the bucket until it ends, goes stale, or ctx
// ends.
func (m *members) watch(ctx context.Context, last *[]string) error {
	wctx, cancel := context.WithCancel(ctx)
	defer cancel()
	w, err := m.kv.WatchAll(wctx)
	if err != nil {
		return err
	}
	defer func() { _ = w.Stop() }()
	m.mu.Lock()
	m.echoed = time.Now() // a new watch has its own staleAfter to deliver
	m.mu.Unlock()
	check := time.NewTicker(m.heartbeat / 2)
	defer check.Stop()
	initial := true
	for {
		select {
		case <-ctx.Done():
			return nil
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
			if m.stale(time.Now()) {
				return errors.New("membership watch delivers nothing although heartbeats are stored")
			}
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
	now := time.Now()
	heard := now
	if initial {
		// A stored value may be old: a worker that died just now.
		if c := e.Created(); c.Before(heard) {
			heard = c
		}
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	// This worker's own key, even as a stored value delivered when the
	// watch begins, shows that the watch delivers.
	if e.Key() == m.id {
		m.echoed = now
		if m.blind {
			m.blind = false
			if !m.failing {
				m.back = now
			}
			m.log.Info().Msg("membership watch delivers again")
		}
	}
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
	now := time.Now()
	m.mu.Lock()
	defer m.mu.Unlock()
	switch {
	case err != nil && !m.failing:
		m.failing = true
		if !m.blind {
			m.awayAt = now
		}
		m.log.Warn().Err(err).Msg("membership heartbeat failed; holding the view of the members until it is stored again")
	case err == nil && m.failing:
		m.failing = false
		if !m.blind {
			m.back = now
		}
		m.log.Info().Msg("membership heartbeat stored again")
	}
	if err == nil {
		m.stored = now
	}
}

// staleAfter is how long stored heartbeats may go without coming back
// through the watch before the watch counts as stale: two heartbeats and
// the round trip of a loaded machine.
func (m *members) staleAfter() time.Duration { return 2*m.heartbeat + 500*time.Millisecond }

// stale tells whether the watch has stopped delivering although this
// worker's heartbeats are stored. It marks the view blind from the last
// echo, so that live holds the view as it was then.
func (m *members) stale(now time.Time) bool {
	m.mu.Lock()
	defer m.mu.Unlock()
	if m.failing || !m.stored.After(m.echoed) || now.Sub(m.echoed) < m.staleAfter() {
		return false
	}
	if !m.blind {
		m.blind, m.awayAt = true, m.echoed
		m.log.Warn().Dur("since", now.Sub(m.echoed)).Msg("membership watch stale; holding the view of the members and watching again")
	}
	return true
}

// live returns the sorted ids heard from within the TTL, this worker
// always among them, and the view as it was when the bucket went out of
// sight while it is out of sight.
func (m *members) live(now time.Time) []string {
	m.mu.Lock()
	defer m.mu.Unlock()
	if m.failing || m.blind {
		now = m.awayAt
	}
	out := []string{m.id}
	for id, t := range m.seen {
		if id == m.id {
			continue
		}
		if t.Before(m.back) && m.awayAt.Sub(t) < m.ttl {
			// Live when the bucket went away: nobody could be heard
			// while it was away, so the TTL counts from its return.
			t = m.back
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
