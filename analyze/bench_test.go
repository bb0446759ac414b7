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
	// The waveform repeats, shifted by one period each round; the index
	// and the round are counted rather than divided out of i, so that the
	// loop costs no integer division per sample.
	k, round := 0, 0.0
	for range b.N {
		s := in[k]
		s.TimeS += round * period
		if _, ok := a.Push(s); ok {
			n++
		}
		if k++; k == len(in) {
			k, round = 0, round+1
		}
	}
	reportCPU(b, cpu0, b.N)
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds()/1e6, "Msamples/s")
	if b.N > 10*len(in) && n == 0 {
		b.Fatal("no breaths")
	}
}
