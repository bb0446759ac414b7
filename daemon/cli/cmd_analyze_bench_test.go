package cli

import (
	"bytes"
	"io"
	"syscall"
	"testing"
	"time"

	"trapline/analyze"
	"trapline/ingest"
	"trapline/simulator"
)

// BenchmarkAnalyzeText measures text decoding of the sample line format v1
// plus breath analysis, per sample (one op is one sample).
func BenchmarkAnalyzeText(b *testing.B) { benchText(b, false) }

// BenchmarkAnalyzeTextAlerts measures what `trapline analyze` does per
// sample: decoding, analysis, detectors and the alarm lifecycle.
func BenchmarkAnalyzeTextAlerts(b *testing.B) { benchText(b, true) }

func benchText(b *testing.B, pipeline bool) {
	sim, err := simulator.New(simulator.Steady{RCmH2OSPerL: 20, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50,
		RateBPM: 20, PEEPCmH2O: 5, SampleRateHz: 200, DurationS: 300, PressureNoiseCmH2O: 0.3, FlowNoiseLPM: 1}.Scenario())
	if err != nil {
		b.Fatal(err)
	}
	enc, err := ingest.NewTextEncoder(ingest.TextEncoderOptions{})
	if err != nil {
		b.Fatal(err)
	}
	text := append([]byte(nil), enc.Header()...)
	n := 0
	for {
		s, ok := sim.Next()
		if !ok {
			break
		}
		text = enc.Append(text, "", s)
		n++
	}
	b.SetBytes(int64(len(text) / n))
	b.ResetTimer()
	var ru0 syscall.Rusage
	_ = syscall.Getrusage(syscall.RUSAGE_SELF, &ru0)
	done := 0
	for done < b.N {
		o := newOffline(analyze.DefaultConfig(), io.Discard, false)
		if pipeline {
			// The path of `trapline analyze`: decoding here, the
			// pipelines on one worker.
			a := &app{stdin: bytes.NewReader(text)}
			if _, err := a.readAll(b.Context(), "-", analyzeFlags{}, o); err != nil {
				b.Fatal(err)
			}
		} else {
			an := analyze.NewAnalyzer(ingest.DefaultStream, analyze.DefaultConfig())
			dec, err := ingest.NewTextDecoder(ingest.DecoderOptions{}, func(_ string, s ingest.Sample) {
				if _, ok := an.Push(s); ok {
					o.breaths++
				}
			})
			if err != nil {
				b.Fatal(err)
			}
			if err := ingest.Decode(bytes.NewReader(text), dec); err != nil {
				b.Fatal(err)
			}
		}
		if o.breaths == 0 {
			b.Fatal("no breaths")
		}
		done += n
	}
	// Throughput per CPU second beside the wall-clock figure, so that a
	// figure measured on a shared, busy machine still means something.
	var ru1 syscall.Rusage
	if syscall.Getrusage(syscall.RUSAGE_SELF, &ru1) == nil {
		cpu := time.Duration(ru1.Utime.Nano() + ru1.Stime.Nano() - ru0.Utime.Nano() - ru0.Stime.Nano())
		if cpu > 0 {
			b.ReportMetric(float64(done)/cpu.Seconds()/1e6, "Msamples/cpu-s")
		}
	}
	b.ReportMetric(float64(done)/b.Elapsed().Seconds()/1e6, "Msamples/s")
}
