package daemon

import (
	"time"

	"trapline/ingest"
)

// When a shard falls behind, its queue holds many reads, each with one or a
// few samples of each of many streams, and running them read by read
// touches every stream's pipeline once per read: with thousands of streams
// that state is no longer in the processor's caches, and each visit pays
// for fetching it. take therefore runs the reads queued behind the one it
// received together, stream by stream: each stream's events in their order,
// one visit for all of them. A shard that keeps up takes one read at a time
// and adds no delay.

// maxTake bounds the reads a shard runs together.
const maxTake = 64

// queuedItem is one stream's event of a read taken with others.
type queuedItem struct {
	it      *workItem
	arrived time.Time
}

// take runs w and, when more reads are queued, those behind it (up to
// maxTake in all) stream by stream. A read that ends a finite source is run
// on its own, after the reads before it.
func (sh *shard) take(w *work) {
	if len(sh.in) == 0 || w.finished != nil {
		sh.work(w)
		return
	}
	ws := append(sh.taken[:0], w)
	var last *work // a read that ends a source, run after the others
	for len(ws) < maxTake && last == nil {
		select {
		case n := <-sh.in:
			if n.finished != nil {
				last = n
				continue
			}
			ws = append(ws, n)
			continue
		default:
		}
		break
	}
	sh.runTogether(ws)
	clear(ws)
	sh.taken = ws[:0]
	if last != nil {
		sh.work(last)
	}
}

// runTogether runs the events of reads ws stream by stream, each stream's
// in the order of the reads, then releases the reads.
func (sh *shard) runTogether(ws []*work) {
	touched := sh.touched[:0]
	for _, w := range ws {
		for i := range w.items {
			it := &w.items[i]
			if len(it.st.queued) == 0 {
				touched = append(touched, it.st)
			}
			it.st.queued = append(it.st.queued, queuedItem{it, w.arrived})
		}
	}
	for _, st := range touched {
		sh.runQueued(st)
		clear(st.queued)
		st.queued = st.queued[:0]
	}
	clear(touched)
	sh.touched = touched[:0]
	sh.cur, sh.arrived = nil, time.Time{}
	for _, w := range ws {
		w.release()
	}
}

// runQueued runs st's queued events in order. Samples alone (no change of
// the source's condition among them) are joined and analysed in one push:
// one visit of the pipeline, one reading of the clock. The breath latency
// then counts from the earliest of the reads.
func (sh *shard) runQueued(st *muxStream) {
	q := st.queued
	joined := sh.joined[:0]
	for _, x := range q {
		if x.it.ev.Status != ingest.StatusNone || st.pl == nil {
			for _, x := range q {
				sh.item(x.it, x.arrived)
			}
			return
		}
		joined = append(joined, x.it.ev.Samples...)
	}
	sh.joined = joined[:0]
	if len(joined) == 0 {
		return
	}
	sh.cur, sh.arrived = st, q[0].arrived
	sh.push(st, joined)
}
