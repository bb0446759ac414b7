package daemon

import (
	"context"
	"math"
	"sync/atomic"
	"testing"
	"time"

	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/analyze"
	"trapline/ingest"
)

// batchSource delivers n batches of one second of a passive lung at 100 Hz
// as fast as the sink takes them, then waits for cancellation.
type batchSource struct {
	n    int
	sent atomic.Uint64
	done chan struct{}
}

func (s *batchSource) Run(ctx context.Context, sink ingest.Sink) error {
	sink(ingest.Event{Status: ingest.StatusConnected})
	batch := make([]ingest.Sample, 100)
	for i := range s.n {
		for k := range batch {
			batch[k] = lungSample(i*100 + k)
		}
		sink(ingest.Event{Samples: batch})
		s.sent.Add(uint64(len(batch)))
	}
	close(s.done)
	<-ctx.Done()
	return nil
}

func (s *batchSource) Stats() ingest.Stats { return ingest.Stats{Samples: s.sent.Load()} }

// lungSample is sample n of a passive single-compartment lung on volume
// control (R 10 cmH2O·s/L, C 50 mL/cmH2O, 0.5 L/s for 1 s, 2 s expiration),
// from the equation of motion in closed form (Bates, Lung Mechanics, 2009).
func lungSample(n int) ingest.Sample {
	t := float64(n) / 100
	tb := math.Mod(t, 3)
	if tb < 1 {
		return ingest.Sample{TimeS: t, PressureCmH2O: 5 + 10*0.5 + 0.5*tb/0.05, FlowLPS: 0.5, VolumeL: ingest.NoVolume}
	}
	v := 0.5 * math.Exp(-(tb-1)/0.5)
	return ingest.Sample{TimeS: t, PressureCmH2O: 5, FlowLPS: -v / 0.5, VolumeL: ingest.NoVolume}
}

// discardSink counts what a stream delivers.
type discardSink struct{ breaths, alerts atomic.Uint64 }

func (d *discardSink) Publish(context.Context, alerts.Event) error { d.alerts.Add(1); return nil }
func (d *discardSink) Breath(*analyze.Breath)                      { d.breaths.Add(1) }
func (d *discardSink) Status(string, []byte)                       {}

// BenchmarkStreamSecondOfSignal measures one stream's whole path (queue,
// breath analysis, detectors, lifecycle, hand-over to the publishers) per
// second of 100 Hz signal; 1 s divided by ns/op is how many such streams one
// core can carry.
func BenchmarkStreamSecondOfSignal(b *testing.B) {
	src := &batchSource{n: b.N, done: make(chan struct{})}
	sink := &discardSink{}
	cfgA, cfgD, cfgL := analyze.DefaultConfig(), analyze.DefaultDetectorConfig(), alerts.DefaultLifecycleConfig()
	s := newStream(streamSpec{
		ID: "bench",
		Open: func() (ingest.Source, streamPipeline, error) {
			return src, pipeline.New(pipeline.Options{Stream: "bench", Analysis: cfgA, Detectors: cfgD, Alarms: cfgL}), nil
		},
		QueueLen: 1 << 16,
	}, zerolog.Nop(), newMetrics(), sink, sink)
	ctx, cancel := context.WithCancel(b.Context())
	done := make(chan error, 1)
	b.ResetTimer()
	go func() { done <- s.Run(ctx) }()
	<-src.done
	// Wait until analysis has taken every batch.
	for s.analysed.Load() < src.sent.Load() {
		time.Sleep(100 * time.Microsecond)
	}
	b.StopTimer()
	cancel()
	<-done
	b.ReportMetric(float64(sink.breaths.Load())/float64(b.N), "breaths/op")
}
