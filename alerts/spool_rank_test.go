package alerts

import (
	"errors"
	"fmt"
	"testing"
)

// TestSpoolKeepsWhatMattersMost: a spool of 5 is filled with low-priority
// escalations; high-priority raises and clears then take their places,
// oldest lowest first, and once only high-ranked events are pending a new
// low one is refused. The head of the queue is never given up.
func TestSpoolKeepsWhatMattersMost(t *testing.T) {
	s, err := OpenSpool(t.TempDir(), 5)
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	ev := func(n int, p Priority, st State) (data []byte, rank int) {
		e := Event{ID: fmt.Sprintf("bed-1/air-trapping/%d", n), Condition: "air-trapping", Priority: p, State: st}
		b, err := e.Marshal()
		if err != nil {
			t.Fatal(err)
		}
		return b, EventRank(&e)
	}
	for n := 1; n <= 5; n++ {
		d, r := ev(n, Low, Escalated)
		if _, evicted, err := s.AppendRanked(d, r); err != nil || evicted {
			t.Fatalf("append %d: evicted %v, %v", n, evicted, err)
		}
	}
	var highs []uint64
	for n := 6; n <= 9; n++ {
		d, r := ev(n, High, Raised)
		seq, evicted, err := s.AppendRanked(d, r)
		if err != nil || !evicted {
			t.Fatalf("high %d into a full spool: evicted %v, %v; want a low one given up", n, evicted, err)
		}
		highs = append(highs, seq)
	}
	if s.Depth() != 5 {
		t.Fatalf("depth %d, want 5", s.Depth())
	}
	// Pending now: the head (low, seq 1) and the four highs.
	if d, r := ev(10, Low, Raised); true {
		if _, _, err := s.AppendRanked(d, r); !errors.Is(err, ErrSpoolFull) {
			t.Fatalf("low raise into a spool of highs: %v, want ErrSpoolFull", err)
		}
	}
	head, ok, err := s.Oldest()
	if err != nil || !ok || head.Seq != 1 {
		t.Fatalf("head %d (%v, %v), want the first event kept", head.Seq, ok, err)
	}
	if got := s.pending[1:]; fmt.Sprint(got) != fmt.Sprint(highs) {
		t.Errorf("pending behind the head %v, want the high ones %v", got, highs)
	}
	// A high raise does not give up a high escalation.
	if d, r := ev(11, High, Raised); true {
		if _, _, err := s.AppendRanked(d, r); !errors.Is(err, ErrSpoolFull) {
			t.Fatalf("high raise into a spool of highs: %v, want ErrSpoolFull", err)
		}
	}
	// Ranks: priority first, then raise/end above escalate/acknowledge.
	order := []Event{{Priority: Low, State: Acknowledged}, {Priority: Low, State: Cleared},
		{Priority: Medium, State: Escalated}, {Priority: Medium, State: Ended}, {Priority: High, State: Escalated}, {Priority: High, State: Raised}}
	for i := 1; i < len(order); i++ {
		if EventRank(&order[i]) <= EventRank(&order[i-1]) {
			t.Errorf("rank of %v %v not above %v %v", order[i].Priority, order[i].State, order[i-1].Priority, order[i-1].State)
		}
	}
}
