package analyze

import (
	"math"
	"testing"
)

// sig3 reports whether got equals want to three significant figures.
func sig3(got, want float64) bool {
	if math.IsNaN(got) {
		return false
	}
	unit := math.Pow(10, math.Floor(math.Log10(math.Abs(want)))-2)
	return math.Abs(got-want) <= unit/2
}

// TestCheckCase1 reproduces check case 1 of docs/formulas.md (derived) (derived from the linear
// single-compartment model, Bates 2009; trapped volume VT·x/(1 − x) after
// Marini, Crooke, Truwit 1989): VT 0.6 L, R 25, C 0.06 L/cmH2O, rate 24,
// Ti 0.8 s square flow without pause, PEEP 5. Samples at 1000 Hz are placed
// half a sample off the flow edges so that no sample falls on a
// discontinuity.
func TestCheckCase1(t *testing.T) {
	m := linearVC{R: 25, C: 0.06, PEEP: 5, VT: 0.6, Rate: 24, TFlow: 0.8, Fs: 1000, Offset: 0.0005, Steady: true}
	breaths := run(DefaultConfig(), m.samples(8))
	if len(breaths) < 6 {
		t.Fatalf("got %d breaths from 8 cycles, want at least 6", len(breaths))
	}
	for _, b := range breaths {
		checks := []struct {
			name      string
			got, want float64
		}{
			{"R", b.RCmH2OSPerL, 25.0},
			{"C", b.CMLPerCmH2O, 60.0},
			{"P0", b.PTot0CmH2O, 9.748},
			{"trapped", b.TrappedML, 285},
			{"trapped_eef", b.TrappedEEFML, 285},
			{"PEEPi", b.PEEPiCmH2O, 4.748},
			{"PEEPi_eef", b.PEEPiEEFCmH2O, 4.748},
			{"EEF", b.EndExpFlowLPM, 11.40},
			{"Ppeak", b.PeakCmH2O, 38.50},
			// No pause: the plateau of the model is P0 + VT/C.
			{"Pplat(fit)", b.PTot0CmH2O + b.VtiML/b.CMLPerCmH2O, 19.75},
			{"tau", b.TauS, 1.5},
			{"Te", b.TeS, 1.7},
			{"rate", b.RateBPM, 24},
			{"VT", b.VtiML, 600},
			{"PEEP", b.PEEPCmH2O, 5},
		}
		for _, c := range checks {
			if !sig3(c.got, c.want) {
				t.Errorf("breath %d: %s = %.5g, want %.4g to 3 significant figures", b.Seq, c.name, c.got, c.want)
			}
		}
		if !math.IsNaN(b.PlateauCmH2O) || !b.HasFlag(FlagNoPause) {
			t.Errorf("breath %d: no pause, want null plateau and flag no-pause, got %v %v", b.Seq, b.PlateauCmH2O, b.Flags)
		}
		if b.HasFlag(FlagEffort) || b.HasFlag(FlagPEEPiMismatch) {
			t.Errorf("breath %d: passive breath flagged %v", b.Seq, b.Flags)
		}
	}
}

// TestOcclusionMethod checks the end-inspiratory pause values against the
// linear single-compartment closed form: with constant flow before the
// pause, (Ppeak − Pplat)/V' = R and VT/(Pplat − total PEEP) = C (occlusion
// method, Bates, Rossi, Milic-Emili, J Appl Physiol 1985), and the plateau
// equals PEEP + (V_ee + VT)/C (derived).
func TestOcclusionMethod(t *testing.T) {
	m := linearVC{R: 20, C: 0.05, PEEP: 8, VT: 0.5, Rate: 15, TFlow: 0.6, Pause: 0.4, Fs: 500, Offset: 0.001, Steady: true}
	bs := run(DefaultConfig(), m.samples(6))
	if len(bs) < 4 {
		t.Fatalf("%d breaths", len(bs))
	}
	for _, b := range bs {
		tr := m.truthOf(int(math.Round(b.StartS / m.period())))
		if !b.HasFlag(FlagPause) {
			t.Fatalf("breath %d: flags %v, want pause", b.Seq, b.Flags)
		}
		if !near(b.ROccCmH2OSPerL, 20, 0.2) || !near(b.CStatMLPerCmH2O, 50, 0.5) || !near(b.PlateauCmH2O, tr.Pplat, 0.01) {
			t.Errorf("breath %d: R_occ %.3f C_stat %.3f Pplat %.3f, want 20, 50, %.3f", b.Seq, b.ROccCmH2OSPerL, b.CStatMLPerCmH2O, b.PlateauCmH2O, tr.Pplat)
		}
		// Ti includes the pause; Te is the rest of the cycle.
		if !near(b.TiS, 1.0, 0.004) || !near(b.TeS, 3.0, 0.004) {
			t.Errorf("breath %d: Ti %.3f Te %.3f, want 1.0 and 3.0", b.Seq, b.TiS, b.TeS)
		}
	}
}

// TestTwoPointTau checks the flow–volume slope against check case 5 of docs/formulas.md (derived)
// (derived: volume still to exhale = τ·|V'|): remaining 0.30 and 0.10 L at
// flows 0.60 and 0.20 L/s give τ 0.50 s. With 0.4 L in the lung the exhaled
// volumes are 0.10 and 0.30 L; a midpoint on the same line is added because
// the fit needs three points.
func TestTwoPointTau(t *testing.T) {
	var l linreg
	for _, p := range [][2]float64{{0.10, 0.60}, {0.20, 0.40}, {0.30, 0.20}} {
		l.add(p[0], p[1])
	}
	if got := l.tau(); !near(got, 0.5, 1e-12) {
		t.Errorf("tau = %v, want 0.5", got)
	}
}
