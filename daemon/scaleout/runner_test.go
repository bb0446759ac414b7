package scaleout

import (
	"testing"
	"time"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/analyze"
	"trapline/config"
	"trapline/ingest"
)

// TestWorkerReportsSampleHoles checks that a hole in a stream's sample
// times (a batch its edge dropped) reaches the pipeline as a gap and
// raises the sample-gaps alarm (its default: one gap of 1 s or longer),
// while regular samples raise nothing.
func TestWorkerReportsSampleHoles(t *testing.T) {
	for _, tc := range []struct {
		name  string
		holeS float64
		want  bool
	}{{"no hole", 0, false}, {"2 s hole", 2, true}} {
		t.Run(tc.name, func(t *testing.T) {
			cfg := config.Default()
			wall := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
			sr := &streamRun{id: "bed-1"}
			sr.pl = pipeline.New(pipeline.Options{Stream: "bed-1", Analysis: cfg.Analysis, Detectors: cfg.Detectors,
				Alarms: cfg.Alarms, Now: func() time.Time { return wall }})
			tS := 0.0
			for i := range 10 {
				sr.buf = sr.buf[:0]
				for range 100 {
					sr.buf = append(sr.buf, ingest.Sample{TimeS: tS, PressureCmH2O: 5, FlowLPS: 0})
					tS += 0.01
				}
				if i == 4 {
					tS += tc.holeS
				}
				sr.wall = wall
				sr.gaps()
				sr.pl.Push(sr.buf, pipeline.Discard{})
				wall = wall.Add(time.Second)
			}
			var out pipeline.Output
			for range 5 {
				sr.pl.TickTo(wall, &out)
				wall = wall.Add(time.Second)
			}
			got := false
			for _, ev := range out.Alerts {
				if ev.Condition == analyze.CondSampleGaps && ev.State == alerts.Raised {
					got = true
				}
			}
			if got != tc.want {
				t.Errorf("sample-gaps raised %v, want %v (alerts %v)", got, tc.want, out.Alerts)
			}
		})
	}
}
