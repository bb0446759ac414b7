package daemon

import (
	"context"
	"encoding/json"
	"os"
	"sync"
	"testing"
	"time"

	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/ingest"
)

// resumingCounter is a countingPipeline that can be checkpointed: its
// checkpoint records how many batches it had analysed (as SeqReserved).
type resumingCounter struct {
	countingPipeline
}

var _ resumable = (*resumingCounter)(nil)

func (p *resumingCounter) Checkpoint(now time.Time, clean bool) pipeline.Checkpoint {
	return pipeline.Checkpoint{Version: 1, SavedAt: now, SeqReserved: p.batches, Clean: clean}
}
func (p *resumingCounter) SeqReservationDue() bool { return false }
func (p *resumingCounter) Resume(pipeline.Checkpoint, time.Time, time.Duration) (pipeline.Output, error) {
	return pipeline.Output{}, nil
}
func (p *resumingCounter) Active() []alerts.Event { return nil }

// checkpointReader is an alert sink that, as each alarm event arrives, reads
// the stream's checkpoint file as a kill -9 at that moment would leave it.
type checkpointReader struct {
	*memSink
	path string
	mu   sync.Mutex
	seen []int // SeqReserved of the checkpoint on disk at each event; -1: none
}

func (c *checkpointReader) Publish(ctx context.Context, ev alerts.Event) error {
	at := -1
	if data, err := os.ReadFile(c.path); err == nil {
		var cp pipeline.Checkpoint
		if json.Unmarshal(data, &cp) == nil {
			at = cp.SeqReserved
		}
	}
	c.mu.Lock()
	c.seen = append(c.seen, at)
	c.mu.Unlock()
	return c.memSink.Publish(ctx, ev)
}

// TestAlarmCheckpointedBeforeDelivery: an alarm raised between two
// periodic checkpoints (every 2 s) is in the checkpoint on disk before its
// event is delivered, so that a kill -9 right after the delivery does not
// leave an alarm that the restarted daemon does not know and never ends.
// The pipeline raises on its 5th batch, 25 ms after the periodic
// checkpoint of the first one; before the change the file still held that
// first checkpoint when the raise went out.
func TestAlarmCheckpointedBeforeDelivery(t *testing.T) {
	const raiseAt = 5
	cont := newContinuity(t.TempDir(), "bed-9")
	sink := &checkpointReader{memSink: newMemSink(), path: cont.path}
	s := newStream(streamSpec{
		ID:         "bed-9",
		Continuity: cont,
		Open: func() (ingest.Source, streamPipeline, error) {
			return &fakeSource{period: 5 * time.Millisecond}, &resumingCounter{countingPipeline{stream: "bed-9", raiseAt: raiseAt}}, nil
		},
		Backoff: restartPolicy{Min: 10 * time.Millisecond, Max: 20 * time.Millisecond, StableAfter: time.Minute},
	}, zerolog.Nop(), newMetrics(), sink, sink.memSink)
	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan error, 1)
	go func() { done <- s.Run(ctx) }()
	waitFor(t, 10*time.Second, "the alarm to be delivered", func() bool {
		sink.mu.Lock()
		defer sink.mu.Unlock()
		return len(sink.seen) > 0
	})
	cancel()
	if err := <-done; err != nil {
		t.Fatalf("Run: %v", err)
	}
	sink.mu.Lock()
	defer sink.mu.Unlock()
	if got := sink.seen[0]; got != raiseAt {
		t.Errorf("when the raise was delivered the checkpoint on disk was that of batch %d, want %d (the batch that raised it)", got, raiseAt)
	}
}
