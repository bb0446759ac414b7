package scaleout

import (
	"math"
	"testing"
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
