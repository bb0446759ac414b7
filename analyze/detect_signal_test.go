package analyze

import (
	"errors"
	"math"
	"math/rand/v2"
	"reflect"
	"testing"

	"trapline/ingest"
)

// breathing returns samples of a passive breath pattern at rateHz from t0
// for durS seconds: sinusoidal flow and pressure in phase with it, as the
// resistive term of the equation of motion gives (Paw = R·V' + V/C + P0;
// Bates 2009). sign −1 reverses the flow.
func breathing(t0, durS, rateHz, sign float64) []ingest.Sample {
	var out []ingest.Sample
	for i := 0; float64(i) < durS*rateHz; i++ {
		ts := t0 + float64(i)/rateHz
		flow := 0.5 * math.Sin(2*math.Pi*ts/3)
		out = append(out, ingest.Sample{TimeS: ts, PressureCmH2O: 12 + 20*flow, FlowLPS: sign * flow, VolumeL: math.NaN()})
	}
	return out
}

func findCond(fs []Finding, cond string) (Finding, bool) {
	for _, f := range fs {
		if f.Condition == cond {
			return f, true
		}
	}
	return Finding{}, false
}

func TestSignalLost(t *testing.T) {
	cfg := DefaultDetectorConfig().Signal // lost after 5 s
	s := NewSignal(cfg)
	s.Samples(breathing(0, 10, 50, 1), 10, nil)
	for _, c := range []struct {
		now  float64
		want bool
	}{{11, false}, {14.9, false}, {15, true}, {30, true}} {
		f, _ := findCond(s.Tick(c.now, nil), CondSignalLost)
		if f.Present != c.want {
			t.Errorf("at %v s: present %v, want %v (%s)", c.now, f.Present, c.want, f.Message)
		}
	}
	s.Status(ingest.StatusDisconnected, 0, errors.New("read /dev/ttyUSB0: EOF"), 31)
	f, _ := findCond(s.Tick(32, nil), CondSignalLost)
	if f.Evidence["disconnected"] != 1 {
		t.Errorf("disconnection not in evidence: %v %s", f.Evidence, f.Message)
	}
	// Reconnection: the first batch clears at once.
	fs := s.Samples(breathing(40, 1, 50, 1), 40, nil)
	if f, ok := findCond(fs, CondSignalLost); !ok || f.Present {
		t.Errorf("samples after loss: %v %v, want an absent signal-lost finding", ok, f)
	}
	// Never any sample: lost counts from the first tick.
	s2 := NewSignal(cfg)
	s2.Tick(100, nil)
	if f, _ := findCond(s2.Tick(105, nil), CondSignalLost); !f.Present {
		t.Errorf("no samples for 5 s since start: not lost")
	}
}

func TestSignalImplausible(t *testing.T) {
	cfg := DefaultDetectorConfig().Signal // 20 s windows
	flat := func(t0, dur float64) []ingest.Sample {
		var out []ingest.Sample
		for i := 0; float64(i) < dur*50; i++ {
			out = append(out, ingest.Sample{TimeS: t0 + float64(i)/50, PressureCmH2O: 0.05, FlowLPS: 0})
		}
		return out
	}
	clipped := func(t0, dur float64) []ingest.Sample {
		out := breathing(t0, dur, 50, 1)
		for i := range out {
			out[i].PressureCmH2O = min(out[i].PressureCmH2O*10, 120) // rail at the range's top
		}
		return out
	}
	spike := func(t0, dur float64) []ingest.Sample {
		out := breathing(t0, dur, 50, 1)
		for i := 100; i < len(out); i += 500 {
			out[i].PressureCmH2O = 400 // one spike every 10 s
		}
		return out
	}
	tests := []struct {
		name    string
		samples func(t0, dur float64) []ingest.Sample
		want    bool
		key     string
	}{
		{"breathing", func(t0, d float64) []ingest.Sample { return breathing(t0, d, 50, 1) }, false, "pressure_flow_corr"},
		{"reversed flow", func(t0, d float64) []ingest.Sample { return breathing(t0, d, 50, -1) }, true, "pressure_flow_corr"},
		{"flat line", flat, true, "pressure_range_cmh2o"},
		{"out of range", spike, true, "out_of_range_samples"},
		{"clipping", clipped, true, "clipped_runs"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			s := NewSignal(cfg)
			fs := s.Samples(tt.samples(0, 41), 41, nil)
			var got []Finding
			for _, f := range fs {
				if f.Condition == CondSignalImplausible {
					got = append(got, f)
				}
			}
			if len(got) != 2 {
				t.Fatalf("%d window verdicts over 41 s, want 2", len(got))
			}
			for _, f := range got {
				if f.Present != tt.want {
					t.Errorf("present %v, want %v: %s %v", f.Present, tt.want, f.Message, f.Evidence)
				}
				if _, ok := f.Evidence[tt.key]; !ok {
					t.Errorf("evidence %v lacks %s", f.Evidence, tt.key)
				}
			}
		})
	}
}

func TestSampleGapsAndDecoderErrors(t *testing.T) {
	cfg := DefaultDetectorConfig().Signal // 3 gaps/min or one of 1 s; 1 % errors, at least 10
	s := NewSignal(cfg)
	s.Samples(breathing(0, 1, 50, 1), 1, nil)
	s.Status(ingest.StatusGap, 0.1, nil, 2)
	s.Status(ingest.StatusGap, 0.1, nil, 3)
	if f, _ := findCond(s.Tick(3, nil), CondSampleGaps); f.Present {
		t.Errorf("2 short gaps: present")
	}
	s.Status(ingest.StatusGap, 0.1, nil, 4)
	if f, _ := findCond(s.Tick(4, nil), CondSampleGaps); !f.Present || f.Evidence["gaps_last_min"] != 3 {
		t.Errorf("3 gaps in a minute: %v %v", f.Present, f.Evidence)
	}
	if f, _ := findCond(s.Tick(65, nil), CondSampleGaps); f.Present {
		t.Errorf("a minute later: still present %v", f.Evidence)
	}
	s.Status(ingest.StatusGap, 1.5, nil, 70)
	if f, _ := findCond(s.Tick(70, nil), CondSampleGaps); !f.Present {
		t.Errorf("one 1.5 s gap: not present")
	}

	s.Decoder(ingest.Stats{Samples: 1000, BadLines: 5}, 80)
	if f, _ := findCond(s.Tick(80, nil), CondDecoderErrors); f.Present {
		t.Errorf("5 bad of 1005 (below the minimum count): present %v", f.Evidence)
	}
	s.Decoder(ingest.Stats{Samples: 1000, BadFrames: 20}, 81)
	if f, _ := findCond(s.Tick(81, nil), CondDecoderErrors); !f.Present || !detNear(f.Evidence["error_rate"], 25.0/2025, 1e-4) {
		t.Errorf("25 bad of 2025: %v %v", f.Present, f.Evidence)
	}
	if f, _ := findCond(s.Tick(150, nil), CondDecoderErrors); f.Present {
		t.Errorf("after the window: still present %v", f.Evidence)
	}
}

// TestSignalBatchesMatchSingles checks that the implausibility windows come
// out the same whatever the batches the samples arrive in: every sample
// alone, or batches of random length, on a signal with flat stretches,
// values out of range, values and times that are not finite, and times
// that go back, for windows shorter and longer than a batch.
func TestSignalBatchesMatchSingles(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	for round := range 40 {
		cfg := DefaultDetectorConfig().Signal
		cfg.WindowS = []float64{0.05, 0.3, 2, 20}[round%4]
		var ss []ingest.Sample
		tS := 0.0
		for i := range 3000 {
			tS += 0.01
			x := ingest.Sample{TimeS: tS, PressureCmH2O: 10 + 5*math.Sin(float64(i)/30), FlowLPS: math.Cos(float64(i) / 30)}
			switch r.IntN(60) {
			case 0:
				x.TimeS = math.NaN()
			case 1:
				x.TimeS -= 3
			case 2:
				x.PressureCmH2O = math.NaN()
			case 3:
				x.FlowLPS = math.Inf(1)
			case 4:
				x.PressureCmH2O = 200
			case 5:
				x.TimeS = math.Inf(1)
			}
			if i%500 < 60 {
				x.PressureCmH2O, x.FlowLPS = 7, 0 // a flat line
			}
			ss = append(ss, x)
		}
		single, batched := NewSignal(cfg), NewSignal(cfg)
		var want, got []Finding
		for i := range ss {
			want = single.Samples(ss[i:i+1], ss[i].TimeS, want)
		}
		for i := 0; i < len(ss); {
			n := min(1+r.IntN(40), len(ss)-i)
			got = batched.Samples(ss[i:i+n], ss[i+n-1].TimeS, got)
			i += n
		}
		present := 0
		for _, f := range want {
			if f.Present {
				present++
			}
		}
		if present == 0 || present == len(want) {
			t.Fatalf("round %d: %d of %d windows implausible: not a test of both verdicts", round, present, len(want))
		}
		if !reflect.DeepEqual(got, want) {
			t.Fatalf("round %d: batches gave %d findings, single samples %d; they differ", round, len(got), len(want))
		}
	}
}
