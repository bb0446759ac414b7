package ingest

import (
	"context"
	"fmt"
	"sync"
)

// OverloadPolicy says what a source does with samples when its sink falls
// behind and the buffer between them is full. Status events are never
// dropped.
type OverloadPolicy int

const (
	// OverloadDefault is OverloadBlock for file and stdin (offline input
	// must not lose a sample) and OverloadDropOldest for live sources.
	OverloadDefault OverloadPolicy = iota
	// OverloadBlock makes the reader wait for the sink.
	OverloadBlock
	// OverloadDropOldest drops the oldest buffered batch of samples: a live
	// monitor wants the newest signal.
	OverloadDropOldest
	// OverloadDropNewest drops the incoming batch and keeps what is buffered.
	OverloadDropNewest
)

// String names the policy as configuration spells it.
// For resolves OverloadDefault for a source of the given URL scheme: a
// file or stdin blocks (nothing dropped), a live source drops the oldest.
// Any other policy is returned as it is. Every queue behind a source (the
// source's own and the daemon's) follows the resolved policy.
func (p OverloadPolicy) For(scheme string) OverloadPolicy {
	if p != OverloadDefault {
		return p
	}
	if scheme == "file" || scheme == "stdin" {
		return OverloadBlock
	}
	return OverloadDropOldest
}

func (p OverloadPolicy) String() string {
	switch p {
	case OverloadBlock:
		return "block"
	case OverloadDropOldest:
		return "drop-oldest"
	case OverloadDropNewest:
		return "drop-newest"
	default:
		return "default"
	}
}

// ParseOverloadPolicy reads "default", "block", "drop-oldest" or
// "drop-newest".
func ParseOverloadPolicy(s string) (OverloadPolicy, error) {
	for _, p := range []OverloadPolicy{OverloadDefault, OverloadBlock, OverloadDropOldest, OverloadDropNewest} {
		if s == p.String() || s == "" && p == OverloadDefault {
			return p, nil
		}
	}
	return 0, fmt.Errorf("overload policy %q: want default, block, drop-oldest or drop-newest", s)
}

// batchSamples is the most samples one event carries.
const batchSamples = 256

// batchPool recycles the sample slices of events.
var batchPool = sync.Pool{New: func() any {
	b := make([]Sample, 0, batchSamples)
	return &b
}}

func getBatch() *[]Sample { return batchPool.Get().(*[]Sample) }

// smallBatch is the starting capacity of the batches of a direct sink,
// whose reads of a live link of many streams bring a sample or two per
// stream, or about ten with a batch window of 100 ms at 100 Hz (see
// Options.Hold): a batch that outgrows it is grown by append and pooled
// as large.
const smallBatch = 16

// smallPool recycles the small batches.
var smallPool = sync.Pool{New: func() any {
	b := make([]Sample, 0, smallBatch)
	return &b
}}

func getSmallBatch() *[]Sample { return smallPool.Get().(*[]Sample) }

func putBatch(b *[]Sample) {
	if b == nil {
		return
	}
	*b = (*b)[:0]
	if cap(*b) < batchSamples {
		smallPool.Put(b)
		return
	}
	batchPool.Put(b)
}

// queued is an event and the pooled slice that holds its samples.
type queued struct {
	ev  Event
	buf *[]Sample
	// gapFromS is the time of the first sample dropped just before this
	// batch of its stream, when hasGap.
	gapFromS float64
	hasGap   bool
}

// queue is the bounded buffer between a source's readers and its sink.
type queue struct {
	mu       sync.Mutex
	base     []queued // the backing array evs returns to when empty
	evs      []queued
	capacity int
	policy   OverloadPolicy
	closed   bool
	notify   chan struct{} // an event was pushed or the queue closed
	space    chan struct{} // an event was popped
	// holeFromS is, per stream, the first sample of a hole that no batch
	// in the queue closes yet: the next batch of the stream pushed will.
	holeFromS map[string]float64
	onDrop    func(samples int, episodeStart bool)
	dropping  bool
}

func newQueue(capacity int, policy OverloadPolicy, onDrop func(int, bool)) *queue {
	base := make([]queued, 0, capacity+8)
	return &queue{
		base:      base,
		evs:       base,
		capacity:  capacity,
		policy:    policy,
		notify:    make(chan struct{}, 1),
		space:     make(chan struct{}, 1),
		holeFromS: map[string]float64{},
		onDrop:    onDrop,
	}
}

func signal(c chan struct{}) {
	select {
	case c <- struct{}{}:
	default:
	}
}

// push adds an event. A batch of samples meets the overload policy when the
// queue is full; a status event is always added. push returns ctx.Err()
// only when it was blocked and the context ended.
func (q *queue) push(ctx context.Context, e queued) error {
	q.mu.Lock()
	for e.ev.Samples != nil && len(q.evs) >= q.capacity && q.policy == OverloadBlock && !q.closed {
		q.mu.Unlock()
		select {
		case <-q.space:
		case <-ctx.Done():
			putBatch(e.buf)
			return ctx.Err()
		}
		q.mu.Lock()
	}
	defer q.mu.Unlock()
	if e.ev.Samples != nil && len(q.evs) >= q.capacity {
		if q.policy != OverloadDropOldest {
			q.drop(e, -1)
			return nil
		}
		for i, x := range q.evs {
			if x.ev.Samples != nil {
				q.drop(x, i)
				q.evs = append(q.evs[:i], q.evs[i+1:]...)
				q.evs[:len(q.evs)+1][len(q.evs)] = queued{}
				break
			}
		}
	}
	if e.ev.Samples != nil {
		if from, ok := q.holeFromS[e.ev.Stream]; ok {
			delete(q.holeFromS, e.ev.Stream)
			e.gapFromS, e.hasGap = from, true
		}
	}
	q.evs = append(q.evs, e)
	signal(q.notify)
	return nil
}

// drop discards a batch (at index i of the queue, or the incoming one when
// i < 0) and makes the next batch of its stream announce the hole.
func (q *queue) drop(e queued, i int) {
	stream := e.ev.Stream
	from := e.ev.Samples[0].TimeS
	if e.hasGap {
		from = e.gapFromS // the hole before it grows by this batch
	}
	closed := false
	if i >= 0 {
		for k := i + 1; k < len(q.evs); k++ {
			if x := &q.evs[k]; x.ev.Stream == stream && x.ev.Samples != nil {
				if !x.hasGap || from < x.gapFromS {
					x.gapFromS = from
				}
				x.hasGap, closed = true, true
				break
			}
		}
	}
	if !closed {
		if old, ok := q.holeFromS[stream]; !ok || from < old {
			q.holeFromS[stream] = from
		}
	}
	n := len(e.ev.Samples)
	start := !q.dropping
	q.dropping = true
	putBatch(e.buf)
	if q.onDrop != nil {
		q.onDrop(n, start)
	}
}

// close marks the end of input; pop returns what is left, then false.
func (q *queue) close() {
	q.mu.Lock()
	q.closed = true
	q.mu.Unlock()
	signal(q.notify)
	signal(q.space)
}

// pop waits for the next event. It returns false when the queue is closed
// and empty or ctx ends. gapS is the time from the first sample dropped to
// the event's first sample, when samples of its stream were dropped just
// before it, and 0 otherwise.
func (q *queue) pop(ctx context.Context) (e queued, gapS float64, ok bool) {
	for {
		q.mu.Lock()
		if len(q.evs) > 0 {
			e = q.evs[0]
			q.evs[0] = queued{}
			q.evs = q.evs[1:]
			if len(q.evs) == 0 {
				q.evs = q.base[:0]
				q.dropping = false
			}
			if e.hasGap {
				gapS = e.ev.Samples[0].TimeS - e.gapFromS
			}
			q.mu.Unlock()
			signal(q.space)
			return e, gapS, true
		}
		closed := q.closed
		q.mu.Unlock()
		if closed {
			return queued{}, 0, false
		}
		select {
		case <-q.notify:
		case <-ctx.Done():
			return queued{}, 0, false
		}
	}
}
