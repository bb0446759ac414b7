package analyze

import (
	"math"
	"testing"

	"trapline/ingest"
)

func near(got, want, tol float64) bool { return math.Abs(got-want) <= tol }

// TestPredictCheckCases checks the steady-state predictions against the
// check cases of docs/formulas.md (derived from the linear single-compartment model; trapped volume
// VT·x/(1 − x), analogous to Marini, Crooke, Truwit, J Appl Physiol 1989).
func TestPredictCheckCases(t *testing.T) {
	t.Run("case 1", func(t *testing.T) {
		p, err := Predict(Patient{RCmH2OSPerL: 25, CMLPerCmH2O: 60, DeadSpaceML: 150},
			Settings{VtML: 600, InspTimeS: 0.8, RateBPM: 24, PEEPCmH2O: 5})
		if err != nil {
			t.Fatal(err)
		}
		for _, c := range []struct {
			name           string
			got, want, tol float64
		}{
			{"tau", p.TauS, 1.5, 1e-9}, {"Te", p.TeS, 1.7, 1e-9},
			{"trapped", p.TrappedML, 284.9, 0.05}, {"PEEPi", p.PEEPiCmH2O, 4.748, 0.0005},
			{"Pplat", p.PlateauCmH2O, 19.75, 0.005}, {"Ppeak", p.PeakCmH2O, 38.50, 0.005},
			{"flow", p.Settings.FlowLPM, 45, 1e-9}, {"VE", p.MinuteVolLPM, 14.4, 1e-9},
		} {
			if !near(c.got, c.want, c.tol) {
				t.Errorf("%s = %.5g, want %.5g", c.name, c.got, c.want)
			}
		}
	})
	t.Run("case 3 negative control", func(t *testing.T) {
		// C 0.05, R 5, VT 0.5, RR 20, Ti 1: τ 0.25 s, V_trap 0.17 mL, Ppeak 17.5.
		p, err := Predict(Patient{RCmH2OSPerL: 5, CMLPerCmH2O: 50}, Settings{VtML: 500, InspTimeS: 1, RateBPM: 20, PEEPCmH2O: 5})
		if err != nil {
			t.Fatal(err)
		}
		if !near(p.TauS, 0.25, 1e-9) || !near(p.TrappedML, 0.17, 0.005) || !near(p.PeakCmH2O, 17.5, 0.01) {
			t.Errorf("tau %g trapped %g peak %g, want 0.25 0.17 17.5", p.TauS, p.TrappedML, p.PeakCmH2O)
		}
	})
	t.Run("case 6 PaCO2", func(t *testing.T) {
		// Alveolar ventilation equation (West): rate 20 → 12 at constant VT
		// and dead space: 40 → 66.7 mmHg.
		pt := Patient{RCmH2OSPerL: 10, CMLPerCmH2O: 50, DeadSpaceML: 150}
		cur, err := Predict(pt, Settings{VtML: 500, InspTimeS: 1, RateBPM: 20})
		if err != nil {
			t.Fatal(err)
		}
		cand, err := Predict(pt, Settings{VtML: 500, InspTimeS: 1, RateBPM: 12})
		if err != nil {
			t.Fatal(err)
		}
		if got := 40 * PaCO2Ratio(cur, cand); !near(got, 66.7, 0.05) {
			t.Errorf("PaCO2 = %.2f mmHg, want 66.7", got)
		}
	})
}

// TestTeForTrapped checks the inverse of V_trap = VT·x/(1 − x) (the linear single-compartment model, docs/formulas.md).
func TestTeForTrapped(t *testing.T) {
	tests := []struct {
		name                string
		vt, tau, target, te float64
	}{
		// Case 1 patient: Te for 50 mL is τ·ln(1 + 600/50) = 1.5·ln 13.
		{"case 1 to 50 mL", 600, 1.5, 50, 1.5 * math.Log(13)},
		// Trapped volume equal to VT needs x = 1/2: Te = τ·ln 2.
		{"half", 500, 1, 500, math.Ln2},
		{"zero target", 500, 1, 0, math.NaN()},
		{"negative tau", 500, -1, 50, math.NaN()},
		{"NaN vt", math.NaN(), 1, 50, math.NaN()},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got := TeForTrapped(tt.vt, tt.tau, tt.target)
			if math.IsNaN(tt.te) != math.IsNaN(got) || (!math.IsNaN(got) && !near(got, tt.te, 1e-12)) {
				t.Fatalf("TeForTrapped = %v, want %v", got, tt.te)
			}
			if !math.IsNaN(got) {
				if back := SteadyTrappedML(tt.vt, tt.tau, got); !near(back, tt.target, 1e-9) {
					t.Errorf("trapped at that Te = %v, want %v", back, tt.target)
				}
			}
		})
	}
}

// TestBuildUp checks check case 2 of docs/formulas.md (derived) (derived): after a change the
// end-expiratory volume approaches steady state as 1 − xⁿ: 0.678, 0.896,
// 0.967, measured by the analyzer on the closed-form waveform.
func TestBuildUp(t *testing.T) {
	m := linearVC{R: 25, C: 0.06, PEEP: 5, VT: 0.6, Rate: 24, TFlow: 0.8, Fs: 500, Offset: 0.001}
	// Half a second at relaxation volume before the first breath, so that
	// its start is seen.
	var in []ingest.Sample
	for i := 250; i > 0; i-- {
		in = append(in, ingest.Sample{TimeS: m.Offset - float64(i)/m.Fs, PressureCmH2O: 5})
	}
	bs := run(DefaultConfig(), append(in, m.samples(5)...))
	if len(bs) < 3 {
		t.Fatalf("got %d breaths, want 3", len(bs))
	}
	ss := SteadyTrappedML(600, 1.5, 1.7)
	for i, want := range []float64{0.678, 0.896, 0.967} {
		if got := bs[i].TrappedEEFML / ss; !near(got, want, 0.01) {
			t.Errorf("breath %d: trapped/steady = %.3f, want %.3f", i+1, got, want)
		}
	}
}
