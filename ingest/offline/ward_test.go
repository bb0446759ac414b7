package offline_test

import (
	"bytes"
	"slices"
	"sync"
	"testing"

	"trapline/analyze"
	"trapline/ingest"
	"trapline/ingest/offline"
	"trapline/simulator"
)

// breathsOf analyses a recording with one analyzer per stream and returns
// each stream's breath records as JSON lines.
func breathsOf(t *testing.T, data []byte, format ingest.Format, workers int) map[string][]string {
	t.Helper()
	var mu sync.Mutex
	out := map[string][]string{}
	_, err := offline.Run(t.Context(), bytes.NewReader(data), offline.Options{Format: format, Workers: workers},
		func(stream string) offline.Handler {
			a := analyze.NewAnalyzer(stream, analyze.DefaultConfig())
			return func(samples []ingest.Sample) {
				for _, s := range samples {
					if b, ok := a.Push(s); ok {
						mu.Lock()
						out[stream] = append(out[stream], string(b.AppendJSON(nil)))
						mu.Unlock()
					}
				}
			}
		})
	if err != nil {
		t.Fatal(err)
	}
	return out
}

// TestTwoPatientsOneSource: two patients of different rates (15 and 20
// breaths a minute) interleaved on one text and one binary recording give,
// per stream, the breath records of each patient recorded and analysed
// alone, on one goroutine and on two workers.
func TestTwoPatientsOneSource(t *testing.T) {
	var scs []simulator.Scenario
	for k, rate := range []float64{15, 20} {
		sc := simulator.Steady{RCmH2OSPerL: 10 + 8*float64(k), CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: rate,
			PEEPCmH2O: 5, SampleRateHz: 100, DurationS: 120, PressureNoiseCmH2O: 0.2, FlowNoiseLPM: 0.5,
			Seed: uint64(k + 1)}.Scenario()
		sc.Stream = []string{"bed-a", "bed-b"}[k]
		scs = append(scs, sc)
	}
	newSim := func(sc simulator.Scenario) *simulator.Sim {
		s, err := simulator.New(sc)
		if err != nil {
			t.Fatal(err)
		}
		return s
	}
	for _, format := range []ingest.Format{ingest.FormatText, ingest.FormatBinary} {
		t.Run(string(format), func(t *testing.T) {
			want := map[string][]string{}
			for _, sc := range scs {
				var enc ingest.Encoder
				if format == ingest.FormatText {
					enc, _ = ingest.NewTextEncoder(ingest.TextEncoderOptions{})
				} else {
					enc, _ = ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: sc.SampleRateHz, Time: true})
				}
				var alone bytes.Buffer
				_, err := simulator.Stream(t.Context(), newSim(sc), simulator.WriterOutput(&alone), simulator.StreamOptions{Encoder: enc, StreamColumn: true})
				if err != nil {
					t.Fatal(err)
				}
				want[sc.Stream] = breathsOf(t, alone.Bytes(), format, 0)[sc.Stream]
			}
			var ward bytes.Buffer
			_, err := simulator.StreamWard(t.Context(), []*simulator.Sim{newSim(scs[0]), newSim(scs[1])}, simulator.WriterOutput(&ward),
				simulator.WardOptions{Format: format})
			if err != nil {
				t.Fatal(err)
			}
			for _, workers := range []int{0, 2} {
				got := breathsOf(t, ward.Bytes(), format, workers)
				if len(got) != 2 {
					t.Fatalf("%d workers: streams %d, want 2", workers, len(got))
				}
				for id, w := range want {
					// 2 minutes at 15 and 20 a minute, less the first and last.
					if len(w) < 28 || !slices.Equal(got[id], w) {
						t.Errorf("%d workers, %s: %d breaths, alone %d, or not the same", workers, id, len(got[id]), len(w))
					}
				}
			}
		})
	}
}
