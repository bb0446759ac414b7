package daemon

import (
	"testing"
	"time"

	"trapline/alerts/pipeline"
	"trapline/ingest"
	"trapline/simulator"
)

// BenchmarkWorkerStream measures what a worker does per sample of a stream
// it owns, without NATS: decoding the edge's binary messages (50 ms of
// samples at 100 Hz each) and the whole pipeline (analysis, detectors,
// alarm lifecycle). One op is one sample; samples/s on one core divided by
// 100 is the number of 100 Hz streams one core can analyse.
func BenchmarkWorkerStream(b *testing.B) {
	sim, err := simulator.New(simulator.Steady{RCmH2OSPerL: 20, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50,
		RateBPM: 20, PEEPCmH2O: 5, SampleRateHz: 100, DurationS: 300, PressureNoiseCmH2O: 0.3, FlowNoiseLPM: 1}.Scenario())
	if err != nil {
		b.Fatal(err)
	}
	enc, err := ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{Time: true, Volume: true})
	if err != nil {
		b.Fatal(err)
	}
	var msgs [][]byte
	for {
		batch := make([]ingest.Sample, 0, 5)
		for len(batch) < 5 {
			s, ok := sim.Next()
			if !ok {
				break
			}
			batch = append(batch, s)
		}
		if len(batch) == 0 {
			break
		}
		msgs = append(msgs, enc.AppendFrame(nil, "bed-1", batch))
	}
	b.ResetTimer()
	done := 0
	wall := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
	for done < b.N {
		pl := pipeline.New(defaultPipelineOptions("bed-1", func() time.Time { return wall }))
		var buf []ingest.Sample
		dec, err := ingest.NewBinaryDecoder(ingest.DecoderOptions{Stream: "bed-1"}, func(_ string, s ingest.Sample) { buf = append(buf, s) })
		if err != nil {
			b.Fatal(err)
		}
		var em pipeline.Discard
		for _, m := range msgs {
			buf = buf[:0]
			_, _ = dec.Write(m)
			wall = wall.Add(50 * time.Millisecond)
			pl.Push(buf, em)
			if done += len(buf); done >= b.N {
				break
			}
		}
	}
	b.ReportMetric(float64(done)/b.Elapsed().Seconds()/100, "streams@100Hz/core")
}
