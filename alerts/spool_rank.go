package alerts

import (
	"fmt"
	"slices"
)

// Under pressure the spool keeps what matters most. Every event has a rank
// (EventRank): priority first, and within a priority the changes that
// open or close an alarm (raised, cleared, ended) above the ones in
// between (escalated, acknowledged). When the spool is full, a new event
// takes the place of the oldest pending event of the lowest rank below its
// own, which is deleted and counted as evicted; an event that outranks
// nothing pending is refused (ErrSpoolFull). A high-priority event is never
// given up once spooled, and events found on disk at start are kept too:
// what an earlier run kept is not given up for what this run raises.

// spoolKeepRank is the rank of events read back from disk.
const spoolKeepRank = 1 << 30

// evictableBelow: only events ranked below it (low and medium priority)
// may be given up.
const evictableBelow = 2*3 + 1

// EventRank is e's rank for the spool under pressure (higher is kept).
func EventRank(e *Event) int {
	r := 2 * rank(e.Priority)
	if e.State == Raised || e.State.Terminal() {
		r++
	}
	return r + 1
}

// AppendRanked is Append with a rank: when the spool is full the event
// evicts the oldest pending event of the lowest rank below rank, and
// evicted says whether one was. Append ranks its events lowest.
func (s *Spool) AppendRanked(data []byte, rank int) (seq uint64, evicted bool, err error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.closed {
		return 0, false, ErrSpoolClosed
	}
	victim := -1
	if len(s.pending) >= s.max {
		victim = s.lowestBelow(rank)
		if victim < 0 {
			return 0, false, fmt.Errorf("%w: %d events pending in %s, none of lower rank", ErrSpoolFull, len(s.pending), s.dir)
		}
	}
	seq = s.next
	if err := s.write(seq, data); err != nil {
		return 0, false, err
	}
	s.next++
	if victim >= 0 {
		old := s.pending[victim]
		if err := s.removeFile(old); err != nil {
			return seq, false, err
		}
		s.pending = slices.Delete(s.pending, victim, victim+1)
		delete(s.ranks, old)
		evicted = true
	}
	s.pending = append(s.pending, seq)
	if s.ranks == nil {
		s.ranks = map[uint64]int{}
	}
	s.ranks[seq] = rank
	return seq, evicted, nil
}

// lowestBelow returns the index in pending of the oldest event of the
// lowest rank below rank, or -1. The head of the queue (which the drainer
// may be sending) is never chosen.
func (s *Spool) lowestBelow(rank int) int {
	best, bestRank := -1, min(rank, evictableBelow)
	for i := 1; i < len(s.pending); i++ {
		r, ok := s.ranks[s.pending[i]]
		if !ok {
			r = spoolKeepRank
		}
		if r < bestRank {
			best, bestRank = i, r
		}
	}
	return best
}

// OwnEvent reports whether seq was spooled by this process (not found on
// disk at start, where an earlier process may already have sent it).
func (s *Spool) OwnEvent(seq uint64) bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	_, ok := s.ranks[seq]
	return ok
}
