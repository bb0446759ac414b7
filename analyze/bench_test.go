package analyze

import (
	"testing"
)

// BenchmarkAnalyzerPush measures analysis of pre-parsed samples: one op is
// one sample (noisy closed-form waveform at 200 Hz, breaths of 3 s).
func BenchmarkAnalyzerPush(b *testing.B) {
	m := linearVC{R: 20, C: 0.05, PEEP: 5, VT: 0.5, Rate: 20, TFlow: 0.8, Pause: 0.2, Fs: 200, NoiseP: 0.3, NoiseF: 1.0 / 60, Steady: true, Seed: 1}
	in := m.samples(40)
	period := in[len(in)-1].TimeS - in[0].TimeS + 1/m.Fs
	a := NewAnalyzer("bench", DefaultConfig())
	b.ReportAllocs()
	b.ResetTimer()
	cpu0 := cpuTime()
	n := 0
	// The waveform repeats, shifted by one period each round. The rounds
	// are an outer loop over the input rather than an index and a test per
	// sample: the loop then costs a few instructions a sample instead of
	// about 36 (cachegrind), which this figure of the analyzer would
	// otherwise carry.
	for done, round := 0, 0.0; done < b.N; round++ {
		shift := round * period
		run := in[:min(len(in), b.N-done)]
		for i := range run {
			s := run[i]
			s.TimeS += shift
			if _, ok := a.Push(s); ok {
				n++
			}
		}
		done += len(run)
	}
	reportCPU(b, cpu0, b.N)
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds()/1e6, "Msamples/s")
	if b.N > 10*len(in) && n == 0 {
		b.Fatal("no breaths")
	}
}
