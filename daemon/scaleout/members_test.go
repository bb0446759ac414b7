package scaleout

import (
	"math"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"
)

// TestRendezvousSpreadAndMoves checks the two properties rendezvous hashing
// is chosen for (Thaler and Ravishankar, "A name-based mapping scheme for
// rendezvous", 1996): partitions spread evenly over the members, and when
// a member leaves only its own partitions move.
func TestRendezvousSpreadAndMoves(t *testing.T) {
	const n = 1024
	for _, tc := range []struct {
		name    string
		members []string
	}{
		{"two", []string{"w1", "w2"}},
		{"four", []string{"icu-a-1", "icu-a-2", "icu-b-1", "icu-b-2"}},
		{"seven", []string{"a", "b", "c", "d", "e", "f", "g"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			k := float64(len(tc.members))
			// Each partition picks a member with probability 1/k: the count
			// per member is binomial(n, 1/k); allow 4 standard deviations.
			mean, sd := n/k, math.Sqrt(n*(1/k)*(1-1/k))
			total := 0
			for _, m := range tc.members {
				c := len(ownedPartitions(m, tc.members, n))
				total += c
				if math.Abs(float64(c)-mean) > 4*sd {
					t.Errorf("member %s owns %d of %d partitions, want %.0f ± %.0f", m, c, n, mean, 4*sd)
				}
			}
			if total != n {
				t.Errorf("members own %d partitions in all, want %d (each exactly once)", total, n)
			}
			gone := tc.members[0]
			rest := tc.members[1:]
			for p := range n {
				before, after := rendezvousOwner(p, tc.members), rendezvousOwner(p, rest)
				if before != gone && before != after {
					t.Errorf("partition %d moved from %s to %s although %s left", p, before, after, gone)
				}
			}
		})
	}
	if rendezvousOwner(3, nil) != "" {
		t.Error("a partition has an owner among no members")
	}
}

// TestMembersHoldDuringBucketOutage checks the liveness rule: while this
// worker's heartbeat fails nobody expires; after it is stored again every
// member has member_ttl from that moment; a member silent beyond that is
// gone; this worker is always live.
func TestMembersHoldDuringBucketOutage(t *testing.T) {
	m := newMembers(nil, "w1", time.Second, 4*time.Second, zerolog.Nop())
	t0 := time.Now()
	m.seen["w2"] = t0
	m.seen["w3"] = t0.Add(-10 * time.Second) // long gone
	if got := m.live(t0); len(got) != 2 || got[0] != "w1" || got[1] != "w2" {
		t.Fatalf("live at start: %v, want [w1 w2]", got)
	}
	m.failing, m.awayAt = true, t0.Add(time.Second)
	if got := m.live(t0.Add(30 * time.Second)); len(got) != 2 || got[1] != "w2" {
		t.Errorf("live during the outage: %v, want the view held [w1 w2]", got)
	}
	m.failing, m.back = false, t0.Add(30*time.Second)
	if got := m.live(t0.Add(33 * time.Second)); len(got) != 2 {
		t.Errorf("live 3 s after the outage: %v, want [w1 w2] (member_ttl counts from the recovery)", got)
	}
	if got := m.live(t0.Add(35 * time.Second)); len(got) != 1 || got[0] != "w1" {
		t.Errorf("live 5 s after the outage: %v, want only [w1]", got)
	}
}

// entry is a watched key-value entry, for heard.
type entry struct {
	key string
	at  time.Time
}

func (e entry) Bucket() string                  { return "members" }
func (e entry) Key() string                     { return e.key }
func (e entry) Value() []byte                   { return nil }
func (e entry) Revision() uint64                { return 1 }
func (e entry) Created() time.Time              { return e.at }
func (e entry) Delta() uint64                   { return 0 }
func (e entry) Operation() jetstream.KeyValueOp { return jetstream.KeyValuePut }

// TestMembersHoldThroughStaleWatch checks the canary: heartbeats stored
// but not coming back through the watch make the view held from the last
// echo (no member expires, as when a node serving the watch dies), and
// the first echo of a new watch gives every member member_ttl from then.
func TestMembersHoldThroughStaleWatch(t *testing.T) {
	m := newMembers(nil, "w1", 300*time.Millisecond, 1500*time.Millisecond, zerolog.Nop())
	t0 := time.Now()
	m.seen["w2"] = t0
	m.echoed, m.stored = t0, t0
	if m.stale(t0.Add(5 * time.Second)) {
		t.Fatal("stale with no heartbeat stored since the last echo: the bucket may just be quiet")
	}
	m.stored = t0.Add(900 * time.Millisecond)
	if m.stale(t0.Add(m.staleAfter() - time.Millisecond)) {
		t.Error("stale before staleAfter")
	}
	if !m.stale(t0.Add(m.staleAfter())) {
		t.Fatal("not stale although stored heartbeats have not come back for staleAfter")
	}
	if got := m.live(t0.Add(20 * time.Second)); len(got) != 2 || got[1] != "w2" {
		t.Errorf("live while the watch is stale: %v, want the view held [w1 w2]", got)
	}
	back := t0.Add(20 * time.Second)
	m.heard(entry{key: "w1", at: back}, false)
	if m.blind {
		t.Fatal("still blind after this worker's key came back through the watch")
	}
	m.back = back // heard stamps the wall clock; pin it for the arithmetic below
	if got := m.live(back.Add(time.Second)); len(got) != 2 {
		t.Errorf("live 1 s after the watch delivers again: %v, want [w1 w2] (member_ttl counts from then)", got)
	}
	if got := m.live(back.Add(2 * time.Second)); len(got) != 1 {
		t.Errorf("live 2 s after: %v, want only [w1]: w2 was not heard again", got)
	}
}
