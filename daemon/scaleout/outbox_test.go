package scaleout

import (
	"context"
	"errors"
	"testing"
	"time"

	"github.com/rs/zerolog"
)

// TestOutboxBoundedInBytes fills an outbox of 1 KiB with frames of 100
// bytes: a source that cannot wait loses the frames beyond the bound
// (counted), one that can wait is held until an acknowledgement frees
// room, and within a stream the messages keep their order and numbers.
func TestOutboxBoundedInBytes(t *testing.T) {
	o := newOutbox(1024, time.Minute, zerolog.Nop())
	frame := make([]byte, 100)
	queued := 0
	for range 20 {
		if o.put(t.Context(), "bed-1", "trapline.samples.bed-1", frame, false) {
			queued++
		}
	}
	// The first message goes in flight alone (100 bytes, capacity 400);
	// the rest gather into a second message whose capacity grows by
	// doubling: the bytes held never pass the bound by more than one frame.
	if p := o.pendingBytes(); p > 1024+int64(len(frame)) || p < 512 {
		t.Errorf("pending %d bytes, want about the bound of 1024", p)
	}
	if d := o.dropped.Load(); d == 0 || int(d)+queued != 20 {
		t.Errorf("dropped %d and queued %d of 20 frames", d, queued)
	}
	q := o.queues["bed-1"]
	if len(q.msgs) != 2 || q.msgs[0].seq != 0 || q.msgs[1].seq != 1 || len(q.msgs[0].data) != len(frame) {
		t.Fatalf("messages: %d, want the one in flight (batch 0, one frame) and batch 1 gathering the rest", len(q.msgs))
	}

	// A source that can wait blocks until the message in flight is
	// acknowledged, and is then queued.
	done := make(chan bool)
	go func() { done <- o.put(t.Context(), "bed-1", "trapline.samples.bed-1", frame, true) }()
	select {
	case <-done:
		t.Fatal("a full outbox did not make the source wait")
	case <-time.After(50 * time.Millisecond):
	}
	q.msgs[0].first = time.Now()
	o.done(q, nil)
	select {
	case ok := <-done:
		if !ok {
			t.Error("the waiting frame was dropped")
		}
	case <-time.After(2 * time.Second):
		t.Fatal("the waiting source was not released by the acknowledgement")
	}
	if o.acked.Load() != 1 || q.msgs[0].seq != 1 {
		t.Errorf("acknowledged %d, head batch %d: want 1 and 1", o.acked.Load(), q.msgs[0].seq)
	}

	// A waiting source whose context ends gives up and counts the drop.
	for o.pendingBytes()+int64(len(frame)) <= o.maxBytes {
		o.put(t.Context(), "bed-2", "trapline.samples.bed-2", frame, false)
	}
	ctx, cancel := context.WithTimeout(t.Context(), 20*time.Millisecond)
	defer cancel()
	before := o.dropped.Load()
	if o.put(ctx, "bed-1", "trapline.samples.bed-1", frame, true) || o.dropped.Load() != before+1 {
		t.Error("a cancelled wait did not count a drop")
	}
}

// TestOutboxRetriesWithinWindow checks that a failed message is retried
// (its id unchanged) while its first attempt is within the
// de-duplication window, and given up, counted failed, after it.
func TestOutboxRetriesWithinWindow(t *testing.T) {
	o := newOutbox(1<<20, time.Second, zerolog.Nop())
	o.put(t.Context(), "bed-1", "s", []byte("abc"), false)
	q := o.queues["bed-1"]
	q.msgs[0].first = time.Now()
	o.done(q, errors.New("timeout"))
	if o.retried.Load() != 1 || len(q.msgs) != 1 || q.msgs[0].seq != 0 {
		t.Fatalf("retried %d, %d messages: want the same message kept for a retry", o.retried.Load(), len(q.msgs))
	}
	q.msgs[0].first = time.Now().Add(-2 * time.Second)
	o.done(q, errors.New("timeout"))
	if o.failed.Load() != 1 || len(q.msgs) != 0 || o.pendingBytes() != 0 {
		t.Errorf("failed %d, %d messages, %d bytes: want the message given up", o.failed.Load(), len(q.msgs), o.pendingBytes())
	}
}
