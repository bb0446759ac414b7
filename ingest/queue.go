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

func putBatch(b *[]Sample) {
	if b != nil {
		*b = (*b)[:0]
		batchPool.Put(b)
	}
}

// queued is an event and the pooled slice that holds its samples.
type queued struct {
	ev  Event
	buf *[]Sample
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
	// droppedUpToS is, per stream, the time of the newest dropped sample:
	// the next delivered batch after it is announced by a StatusGap.
	droppedUpToS map[string]float64
	onDrop       func(samples int, episodeStart bool)
	dropping     bool
}

func newQueue(capacity int, policy OverloadPolicy, onDrop func(int, bool)) *queue {
	base := make([]queued, 0, capacity+8)
	return &queue{
		base:         base,
		evs:          base,
		capacity:     capacity,
		policy:       policy,
		notify:       make(chan struct{}, 1),
		space:        make(chan struct{}, 1),
		droppedUpToS: map[string]float64{},
		onDrop:       onDrop,
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
		victim := -1
		if q.policy == OverloadDropOldest {
			for i, x := range q.evs {
				if x.ev.Samples != nil {
					victim = i
					break
				}
			}
		}
		if victim >= 0 {
			q.drop(q.evs[victim])
			q.evs = append(q.evs[:victim], q.evs[victim+1:]...)
		} else {
			q.drop(e)
			return nil
		}
	}
	q.evs = append(q.evs, e)
	signal(q.notify)
	return nil
}

func (q *queue) drop(e queued) {
	n := len(e.ev.Samples)
	last := e.ev.Samples[n-1].TimeS
	if t, ok := q.droppedUpToS[e.ev.Stream]; !ok || last > t {
		q.droppedUpToS[e.ev.Stream] = last
	}
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
// and empty or ctx ends. gapS is set (≥ 0) when samples of the event's
// stream were dropped just before it.
func (q *queue) pop(ctx context.Context) (e queued, dropped bool, ok bool) {
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
			if e.ev.Samples != nil {
				if t, had := q.droppedUpToS[e.ev.Stream]; had && e.ev.Samples[0].TimeS > t {
					delete(q.droppedUpToS, e.ev.Stream)
					dropped = true
				}
			}
			q.mu.Unlock()
			signal(q.space)
			return e, dropped, true
		}
		closed := q.closed
		q.mu.Unlock()
		if closed {
			return queued{}, false, false
		}
		select {
		case <-q.notify:
		case <-ctx.Done():
			return queued{}, false, false
		}
	}
}
