package pipeline

import (
	"fmt"
	"math"
	"os"
	"runtime"
	"runtime/pprof"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
)

// discard is a Sink that keeps nothing.
type discard struct{}

func (discard) Breath(*analyze.Breath) {}
func (discard) Alert(*alerts.Event)    {}

// passiveSample is sample n of a passive lung on volume control at 100 Hz:
// constant inspiratory flow of 0.5 L/s for 1 s, then an exponential
// expiration with τ = 0.5 s over 2 s (the closed form of the one-compartment
// linear model, Bates, "Lung Mechanics", 2009).
func passiveSample(n int) ingest.Sample {
	t := float64(n) / 100
	tb := math.Mod(t, 3)
	if tb < 1 {
		return ingest.Sample{TimeS: t, PressureCmH2O: 10 + 10*tb, FlowLPS: 0.5, VolumeL: ingest.NoVolume}
	}
	v := 0.5 * math.Exp(-(tb-1)/0.5)
	return ingest.Sample{TimeS: t, PressureCmH2O: 5, FlowLPS: -v / 0.5, VolumeL: ingest.NoVolume}
}

// BenchmarkPipelineMemory measures the heap a live pipeline holds once it
// is in its stride: 1,000 pipelines, each fed 30 s of a 100 Hz stream in
// turns of 50 ms (as a ward's link brings them), then the heap in use per
// pipeline after a collection. This is the per-stream budget of
// docs/operations.md; run with -memprofile to see who holds it.
func BenchmarkPipelineMemory(b *testing.B) {
	const streams, seconds, turn = 1000, 30, 5
	for b.Loop() {
		runtime.GC()
		var before runtime.MemStats
		runtime.ReadMemStats(&before)
		wall := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
		pls := make([]*Pipeline, streams)
		for i := range pls {
			o := options(fmt.Sprintf("bed-%04d", i))
			o.Now = func() time.Time { return wall }
			pls[i] = New(o)
		}
		buf := make([]ingest.Sample, turn)
		for n := 0; n < seconds*100; n += turn {
			wall = wall.Add(turn * 10 * time.Millisecond)
			for i, p := range pls {
				for k := range buf {
					buf[k] = passiveSample(n + k + 7*i)
					buf[k].TimeS = float64(n+k) / 100
				}
				p.Push(buf, discard{})
			}
		}
		runtime.GC()
		var after runtime.MemStats
		runtime.ReadMemStats(&after)
		b.ReportMetric(float64(after.HeapAlloc-before.HeapAlloc)/streams/1024, "KiB/pipeline")
		if path := os.Getenv("TRAPLINE_HEAP_PROFILE"); path != "" {
			writeHeapProfile(b, path) // while the pipelines are alive
		}
		runtime.KeepAlive(pls)
	}
}

func writeHeapProfile(b *testing.B, path string) {
	f, err := os.Create(path)
	if err != nil {
		b.Fatal(err)
	}
	defer f.Close()
	if err := pprof.Lookup("heap").WriteTo(f, 0); err != nil {
		b.Fatal(err)
	}
}
