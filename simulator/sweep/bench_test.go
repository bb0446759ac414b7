package sweep

import (
	"testing"

	"trapline/analyze"
)

// BenchmarkCase measures the cost of one simulated patient-hour per model
// (simulation, analysis, detectors and lifecycle), reported as simulated
// seconds per wall second ("x-realtime").
func BenchmarkCase(b *testing.B) {
	g := DefaultGrid()
	g.DurationS = 600
	g.Seeds = 1
	g.ResistanceCmH2OSPerL = []float64{25}
	g.ComplianceMLPerCmH2O = []float64{50}
	g.Settings = g.Settings[2:3]
	g.Noise = g.Noise[:1]
	g.Scenarios = nil
	plan, err := g.Expand()
	if err != nil {
		b.Fatal(err)
	}
	sets := []DetectorSet{DefaultDetectorSet()}
	for i := range plan.Cases {
		c := &plan.Cases[i]
		b.Run(c.Model, func(b *testing.B) {
			for b.Loop() {
				if _, err := runCase(b.Context(), c, sets, analyze.DefaultConfig(), nil, nil); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(c.DurationS*float64(b.N)/b.Elapsed().Seconds(), "x-realtime")
		})
	}
}
