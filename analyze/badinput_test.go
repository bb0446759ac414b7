package analyze

import (
	"encoding/binary"
	"encoding/json"
	"math"
	"testing"

	"trapline/ingest"
)

// checkBreath asserts the invariants every emitted breath must hold whatever
// the input: no infinities, ordered times, a valid JSON record.
func checkBreath(t *testing.T, b *Breath, prevSeq int) {
	t.Helper()
	if b.Seq <= prevSeq {
		t.Fatalf("seq %d after %d", b.Seq, prevSeq)
	}
	if !(b.EndS > b.StartS) || !(b.TiS > 0) || !(b.TeS > 0) {
		t.Fatalf("breath times start %v end %v ti %v te %v", b.StartS, b.EndS, b.TiS, b.TeS)
	}
	for _, f := range breathFields {
		if v := *f.get(b); math.IsInf(v, 0) {
			t.Fatalf("%s is %v", f.key, v)
		}
	}
	if len(b.Flags) == 0 {
		t.Fatalf("breath without flags (pause or no-pause is always set)")
	}
	var back Breath
	if err := json.Unmarshal(b.AppendJSON(nil), &back); err != nil {
		t.Fatalf("record does not decode: %v", err)
	}
	if b.HasFlag(FlagFitSingular) || b.HasFlag(FlagFitImplausible) {
		if !math.IsNaN(b.RCmH2OSPerL) || !math.IsNaN(b.CMLPerCmH2O) || !math.IsNaN(b.PTot0CmH2O) {
			t.Fatalf("flagged fit reports numbers: R %v C %v P0 %v", b.RCmH2OSPerL, b.CMLPerCmH2O, b.PTot0CmH2O)
		}
	}
}

func TestBadInput(t *testing.T) {
	good := linearVC{R: 20, C: 0.05, PEEP: 5, VT: 0.5, Rate: 20, TFlow: 0.8, Fs: 100, Offset: 0.005, Steady: true}
	flat := func(seconds, fs float64) []ingest.Sample {
		var in []ingest.Sample
		for i := 0; i < int(seconds*fs); i++ {
			in = append(in, ingest.Sample{TimeS: float64(i) / fs, PressureCmH2O: 5, FlowLPS: 0})
		}
		return in
	}
	reversed := good.samples(10)
	for i := range reversed {
		reversed[i].FlowLPS = -reversed[i].FlowLPS
	}
	withNaN := good.samples(10)
	for i := range withNaN {
		switch i % 97 {
		case 3:
			withNaN[i].FlowLPS = math.NaN()
		case 5:
			withNaN[i].PressureCmH2O = math.Inf(1)
		case 7:
			withNaN[i].TimeS = math.NaN()
		}
	}
	oneBreath := good.samples(1)
	tests := []struct {
		name  string
		in    []ingest.Sample
		check func(t *testing.T, bs []Breath)
	}{
		{"empty", nil, func(t *testing.T, bs []Breath) {
			if len(bs) != 0 {
				t.Errorf("got %d breaths", len(bs))
			}
		}},
		{"one breath", oneBreath, func(t *testing.T, bs []Breath) {
			// A breath completes only when the next one starts.
			if len(bs) != 0 {
				t.Errorf("got %d breaths", len(bs))
			}
		}},
		{"ten minutes flat", flat(600, 100), func(t *testing.T, bs []Breath) {
			if len(bs) != 0 {
				t.Errorf("got %d breaths from a flat line", len(bs))
			}
		}},
		{"flat with noise", func() []ingest.Sample {
			m := good
			m.VT = 1e-9
			m.NoiseF, m.NoiseP = 1.0/60, 0.3
			return m.samples(100)
		}(), func(t *testing.T, bs []Breath) {
			if len(bs) != 0 {
				t.Errorf("got %d breaths from noise", len(bs))
			}
		}},
		{"reversed flow sign", reversed, func(t *testing.T, bs []Breath) {
			if len(bs) == 0 {
				t.Fatal("no breaths")
			}
			for _, b := range bs {
				if !b.HasFlag(FlagFlowReversed) || !math.IsNaN(b.RCmH2OSPerL) || b.Reliable() {
					t.Errorf("breath %d: flags %v R %v, want flow-reversed and null R", b.Seq, b.Flags, b.RCmH2OSPerL)
				}
			}
		}},
		{"non-finite samples", withNaN, func(t *testing.T, bs []Breath) {
			if len(bs) < 7 {
				t.Fatalf("got %d breaths, want the breaths around the bad samples", len(bs))
			}
			for _, b := range bs {
				if !b.HasFlag(FlagArtifact) {
					t.Errorf("breath %d: flags %v, want artifact", b.Seq, b.Flags)
				}
			}
		}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			bs := run(DefaultConfig(), tt.in)
			for i := range bs {
				checkBreath(t, &bs[i], i-1)
			}
			tt.check(t, bs)
		})
	}
}

// TestGapResets checks that no breath spans a gap in time: samples missing
// for longer than MaxGapS drop the open breath.
func TestGapResets(t *testing.T) {
	m := linearVC{R: 20, C: 0.05, PEEP: 5, VT: 0.5, Rate: 20, TFlow: 0.8, Fs: 100, Offset: 0.005, Steady: true}
	in := m.samples(12)
	var cut []ingest.Sample
	for _, s := range in {
		if s.TimeS > 16.2 && s.TimeS < 17.5 {
			continue
		}
		cut = append(cut, s)
	}
	for _, b := range run(DefaultConfig(), cut) {
		if b.StartS < 17.5 && b.EndS > 16.2 {
			t.Errorf("breath %d spans the gap: %.2f–%.2f s", b.Seq, b.StartS, b.EndS)
		}
	}
	// Reset by the caller has the same effect.
	a := NewAnalyzer("x", DefaultConfig())
	for _, s := range in {
		if s.TimeS > 16.2 && s.TimeS < 16.21 {
			a.Reset()
		}
		if b, ok := a.Push(s); ok && b.StartS < 16.2 && b.EndS > 16.2 {
			t.Errorf("breath %d spans the reset at 16.2 s", b.Seq)
		}
	}
}

// FuzzAnalyzer feeds arbitrary sample sequences: every input must leave the
// analyzer without panics and every breath must keep the record invariants.
// Each 7 bytes make one sample: a time step (0 = repeated time, 255 = gap),
// pressure and flow as 16-bit values, with 0x7fff read as NaN.
func FuzzAnalyzer(f *testing.F) {
	m := linearVC{R: 20, C: 0.05, PEEP: 5, VT: 0.5, Rate: 30, TFlow: 0.6, Pause: 0.2, Fs: 50, NoiseP: 0.3, NoiseF: 0.02, Steady: true}
	var seed []byte
	for _, s := range m.samples(4) {
		seed = append(seed, 20)
		seed = binary.LittleEndian.AppendUint16(seed, uint16(int16(s.PressureCmH2O*100)))
		seed = binary.LittleEndian.AppendUint16(seed, uint16(int16(s.FlowLPS*10000)))
		seed = append(seed, 0, 0)
	}
	f.Add(seed)
	f.Add([]byte{})
	f.Add([]byte{255, 255, 255, 255, 255, 255, 255, 0, 0, 0, 0, 0, 0, 0})
	f.Fuzz(fuzzBody)
}

func fuzzBody(t *testing.T, data []byte) {
	{
		a := NewAnalyzer("fuzz", DefaultConfig())
		tm := 0.0
		prev := -1
		for len(data) >= 7 {
			step, pr, fl, extra := data[0], int16(binary.LittleEndian.Uint16(data[1:])), int16(binary.LittleEndian.Uint16(data[3:])), binary.LittleEndian.Uint16(data[5:])
			data = data[7:]
			switch step {
			case 0:
			case 255:
				tm += 2
			case 254:
				tm -= 0.1
			default:
				tm += float64(step) / 1000
			}
			s := ingest.Sample{TimeS: tm, PressureCmH2O: float64(pr) / 100, FlowLPS: float64(fl) / 10000 * float64(1+extra%4)}
			if pr == 0x7fff {
				s.PressureCmH2O = math.NaN()
			}
			if fl == 0x7fff {
				s.FlowLPS = math.Inf(-1)
			}
			if b, ok := a.Push(s); ok {
				checkBreath(t, &b, prev)
				prev = b.Seq
			}
		}
	}
}
