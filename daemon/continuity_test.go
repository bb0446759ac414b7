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
	runUntil(t, s, "the alarm to be delivered", func() bool {
		sink.mu.Lock()
		defer sink.mu.Unlock()
		return len(sink.seen) > 0
	})
	sink.mu.Lock()
	defer sink.mu.Unlock()
	if got := sink.seen[0]; got != raiseAt {
		t.Errorf("when the raise was delivered the checkpoint on disk was that of batch %d, want %d (the batch that raised it)", got, raiseAt)
	}
}

// endingCounter is a countingPipeline that can end its open alarm
// (alarmEnder), as the live pipeline can.
type endingCounter struct {
	countingPipeline
	ended int
}

func (p *endingCounter) EndAlarms(now time.Time, reason string) pipeline.Output {
	if p.batches < max(p.raiseAt, 1) || p.ended > 0 {
		return pipeline.Output{}
	}
	p.ended++
	e := p.event(alerts.Ended)
	e.Reason = reason
	return pipeline.Output{Alerts: []alerts.Event{e}}
}

// TestStopEndsAlarmsOfUnresumableStream: a stream that keeps no checkpoint
// ends its open alarm with reason "monitoring stopped" when the daemon
// stops before its input ended, and a recording read to its end keeps
// the alarm it left.
func TestStopEndsAlarmsOfUnresumableStream(t *testing.T) {
	ended := func(sink *memSink) []alerts.Event {
		sink.mu.Lock()
		defer sink.mu.Unlock()
		var out []alerts.Event
		for _, e := range sink.alerts {
			if e.State == alerts.Ended {
				out = append(out, e)
			}
		}
		return out
	}
	backoff := restartPolicy{Min: 10 * time.Millisecond, Max: 20 * time.Millisecond, StableAfter: time.Minute}

	stopped := newMemSink()
	s := newStream(streamSpec{
		ID: "bed-10",
		Open: func() (ingest.Source, streamPipeline, error) {
			return &fakeSource{period: 5 * time.Millisecond}, &endingCounter{countingPipeline: countingPipeline{stream: "bed-10"}}, nil
		},
		Backoff: backoff,
	}, zerolog.Nop(), newMetrics(), stopped, stopped)
	runUntil(t, s, "the raise", func() bool {
		stopped.mu.Lock()
		defer stopped.mu.Unlock()
		return len(stopped.alerts) > 0
	})
	if e := ended(stopped); len(e) != 1 || e[0].Reason != alerts.ReasonStopped {
		t.Errorf("ended events at the stop: %+v, want one with reason %q", e, alerts.ReasonStopped)
	}

	read := newMemSink()
	path := flatRecording(t, "bed-11", 300)
	f := newStream(streamSpec{
		ID: "bed-11", Finite: true,
		Open: func() (ingest.Source, streamPipeline, error) {
			src, err := ingest.Open("file://"+path+"?pace=max", ingest.Options{Stream: "bed-11"})
			return src, &endingCounter{countingPipeline: countingPipeline{stream: "bed-11"}}, err
		},
		Backoff: backoff,
	}, zerolog.Nop(), newMetrics(), read, read)
	runToEnd(t, f)
	if e := ended(read); len(e) != 0 {
		t.Errorf("a recording read to its end ended its alarms: %+v", e)
	}
}

// runUntil runs the stream until cond holds (at most 10 s), then stops it
// as a daemon's shutdown does and fails the test on an error of Run.
func runUntil(t *testing.T, s *stream, what string, cond func() bool) {
	t.Helper()
	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan error, 1)
	go func() { done <- s.Run(ctx) }()
	waitFor(t, 10*time.Second, what, cond)
	cancel()
	if err := <-done; err != nil {
		t.Fatalf("Run: %v", err)
	}
}
