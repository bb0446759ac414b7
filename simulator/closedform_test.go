package simulator

import (
	"fmt"
	"math"
	"testing"
)

// closedForm is the steady state of dynamic hyperinflation of the linear
// single-compartment model under square-flow volume control: x = e^(−Te/τ),
// trapped volume VT·x/(1 − x), intrinsic PEEP = trapped/C, end-expiratory
// flow = trapped/τ, Pplat = PEEP + PEEPi + VT/C, Ppeak = Pplat + R·flow.
// Marini JJ, Crooke PS, Truwit JD, J Appl Physiol 1989;67:1081 (closed
// forms of dynamic hyperinflation); the pressures are [derived from the
// linear single-compartment model, Bates 2009].
type closedForm struct {
	tau, te, x, trappedL, peepi, eefLPS, pplat, ppeak float64
}

func solveClosedForm(rCmH2OSPerL, cLPerCmH2O, vtL, flowLPS, pauseS, rateBPM, peep float64) closedForm {
	var cf closedForm
	cf.tau = rCmH2OSPerL * cLPerCmH2O
	ti := vtL/flowLPS + pauseS
	cf.te = 60/rateBPM - ti
	cf.x = math.Exp(-cf.te / cf.tau)
	cf.trappedL = vtL * cf.x / (1 - cf.x)
	cf.peepi = cf.trappedL / cLPerCmH2O
	cf.eefLPS = cf.trappedL / cf.tau
	cf.pplat = peep + cf.peepi + vtL/cLPerCmH2O
	cf.ppeak = cf.pplat + rCmH2OSPerL*flowLPS
	return cf
}

// lastTruth runs a scenario and returns the ground truth of its last
// completed breath.
func lastTruth(t *testing.T, sc Scenario) Truth {
	t.Helper()
	_, truths, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	if len(truths) == 0 {
		t.Fatal("no completed breath")
	}
	return truths[len(truths)-1]
}

func within(t *testing.T, name string, got, want, relTol float64) {
	t.Helper()
	if math.Abs(got-want) > relTol*math.Abs(want) {
		t.Errorf("%s = %.6g, want %.6g ± %.2g %%", name, got, want, relTol*100)
	}
}

func near(t *testing.T, name string, got, want, absTol float64) {
	t.Helper()
	if math.Abs(got-want) > absTol {
		t.Errorf("%s = %.6g, want %.6g ± %.2g", name, got, want, absTol)
	}
}

// TestCheckCase1 reproduces the published check values of the project
// reference (case 1): VT 0.6 L, R 25, C 0.06, 24 /min, Ti 0.8 s, PEEP 5.
func TestCheckCase1(t *testing.T) {
	for _, hz := range []float64{25, 100, 1000} {
		t.Run(fmt.Sprintf("%gHz", hz), func(t *testing.T) {
			tr := lastTruth(t, Steady{RCmH2OSPerL: 25, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45,
				RateBPM: 24, PEEPCmH2O: 5, SampleRateHz: hz, DurationS: 120}.Scenario())
			// Check values: Marini, Crooke, Truwit, J Appl Physiol 1989;67:1081
			// closed form, evaluated in the project reference §11 case 1.
			near(t, "tau_s", tr.TauS, 1.5, 1e-9)
			near(t, "te_s", tr.TeS, 1.7, 1e-9)
			near(t, "trapped_ml", tr.TrappedML, 284.9, 0.05)
			near(t, "peepi_cmh2o", tr.PEEPiCmH2O, 4.748, 0.0005)
			near(t, "eef_lpm", tr.EndExpFlowLPM, 11.40, 0.005)
			// [derived from the linear single-compartment model, Bates 2009]
			near(t, "pplat_cmh2o", tr.PlateauCmH2O, 19.75, 0.005)
			near(t, "pip_cmh2o", tr.PeakCmH2O, 38.50, 0.005)
			near(t, "vt_ml", tr.VtML, 600, 1e-6)
			if !tr.HasLabel(LabelAirTrapping) || tr.HasLabel(LabelHighPlateau) || !tr.Passive {
				t.Errorf("labels %v passive %v: want air-trapping only, passive", tr.Labels, tr.Passive)
			}
		})
	}
}

// TestCheckCase3 is the negative control of the project reference (§11
// case 3): C 0.05, R 5, VT 0.5, 20 /min, Ti 1 s: τ 0.25 s, trapped 0.17 mL,
// no air trapping, Ppeak 17.5 with PEEP 5.
func TestCheckCase3(t *testing.T) {
	tr := lastTruth(t, Steady{RCmH2OSPerL: 5, CMLPerCmH2O: 50, VtML: 500, InspTimeS: 1,
		RateBPM: 20, PEEPCmH2O: 5, DurationS: 60}.Scenario())
	// Marini, Crooke, Truwit 1989 closed form: VT·x/(1−x) with x = e^(−2/0.25).
	near(t, "tau_s", tr.TauS, 0.25, 1e-9)
	near(t, "trapped_ml", tr.TrappedML, 0.17, 0.005)
	// [derived from the linear single-compartment model, Bates 2009]
	near(t, "pip_cmh2o", tr.PeakCmH2O, 17.5, 0.005)
	if tr.HasLabel(LabelAirTrapping) {
		t.Errorf("labels %v: air trapping must not be present", tr.Labels)
	}
}

// TestClosedFormGrid compares the steady state with the closed form over a
// grid that runs from a healthy lung to severe obstruction.
func TestClosedFormGrid(t *testing.T) {
	type pt struct{ r, c, vt, rate, ti, pause float64 }
	grid := []pt{
		{5, 50, 500, 20, 1, 0}, {10, 50, 500, 15, 1, 0.3}, {15, 40, 450, 18, 1, 0.2}, {20, 45, 500, 20, 0.9, 0},
		{25, 60, 600, 24, 0.8, 0}, {30, 60, 600, 20, 1, 0.2}, {35, 70, 550, 22, 0.8, 0}, {40, 80, 600, 18, 1.2, 0.3},
		{50, 70, 500, 20, 1, 0}, {60, 75, 600, 16, 1, 0.2}, {80, 60, 450, 14, 1.2, 0}, {100, 60, 500, 12, 1.5, 0.3},
		{20, 20, 500, 20, 1, 0}, {20, 20, 300, 20, 1, 0}, {50, 20, 300, 12, 1, 0}, {50, 10, 300, 20, 1, 0},
		{20, 10, 200, 20, 1, 0}, {5, 20, 500, 20, 1, 0}, {5, 50, 500, 20, 1, 0.5}, {30, 100, 800, 25, 0.8, 0},
		{45, 90, 700, 28, 0.7, 0}, {70, 50, 400, 30, 0.6, 0}, {12, 35, 420, 26, 0.9, 0.2}, {90, 80, 650, 10, 2, 0.4},
	}
	for _, g := range grid {
		t.Run(fmt.Sprintf("R%g_C%g_VT%g_f%g_Ti%g_p%g", g.r, g.c, g.vt, g.rate, g.ti, g.pause), func(t *testing.T) {
			flowLPS := g.vt / 1000 / (g.ti - g.pause)
			cf := solveClosedForm(g.r, g.c/1000, g.vt/1000, flowLPS, g.pause, g.rate, 5)
			// Run until x^n is negligible: the build-up is V·(1 − xⁿ).
			n := math.Ceil(math.Log(1e-7)/math.Log(cf.x)) + 3
			sc := Steady{RCmH2OSPerL: g.r, CMLPerCmH2O: g.c, VtML: g.vt, InspTimeS: g.ti, PauseS: g.pause,
				RateBPM: g.rate, PEEPCmH2O: 5, SampleRateHz: 25, DurationS: math.Max(n, 3) * 60 / g.rate}.Scenario()
			tr := lastTruth(t, sc)
			// Marini, Crooke, Truwit, J Appl Physiol 1989;67:1081: trapped volume
			// and intrinsic PEEP within 0.5 % (1e-4 mL when they are near zero).
			if cf.trappedL*1000 < 0.01 {
				near(t, "trapped_ml", tr.TrappedML, cf.trappedL*1000, 1e-4)
			} else {
				within(t, "trapped_ml", tr.TrappedML, cf.trappedL*1000, 0.005)
				within(t, "peepi_cmh2o", tr.PEEPiCmH2O, cf.peepi, 0.005)
			}
			// [derived from the linear single-compartment model, Bates 2009]:
			// Pplat = PEEP + PEEPi + VT/C; Ppeak = Pplat + R·flow.
			within(t, "pplat_cmh2o", tr.PlateauCmH2O, cf.pplat, 0.001)
			within(t, "pip_cmh2o", tr.PeakCmH2O, cf.ppeak, 0.001)
		})
	}
}

// TestBuildUp checks the breath-by-breath build-up of trapped volume after a
// change of settings: V(n) = V_ss + (V_0 − V_ss)·xⁿ, which from the relaxed
// lung is V_ss·(1 − xⁿ): 0.678, 0.896, 0.967 of steady state for the
// reference case (project reference §11 case 2, [derived from the linear
// single-compartment model, Bates 2009]).
func TestBuildUp(t *testing.T) {
	want := []float64{0.678, 0.896, 0.967}
	cf := solveClosedForm(25, 0.06, 0.6, 0.75, 0, 24, 5)
	t.Run("from relaxed lung", func(t *testing.T) {
		_, truths, err := Run(Steady{RCmH2OSPerL: 25, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45,
			RateBPM: 24, PEEPCmH2O: 5, DurationS: 10}.Scenario())
		if err != nil {
			t.Fatal(err)
		}
		for i, w := range want {
			near(t, fmt.Sprintf("breath %d fraction", i+1), truths[i].TrappedML/1000/cf.trappedL, w, 0.0005)
		}
	})
	t.Run("after a rate change", func(t *testing.T) {
		sc := Steady{RCmH2OSPerL: 25, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45,
			RateBPM: 10, PEEPCmH2O: 5, DurationS: 90}.Scenario()
		// 60 s at 10 /min is ten whole breaths; the rate rises at the 11th.
		sc.Timeline = []Step{{AtS: 60, Ventilator: map[string]float64{"rate_bpm": 24}}}
		_, truths, err := Run(sc)
		if err != nil {
			t.Fatal(err)
		}
		v0 := truths[9].TrappedML / 1000
		if truths[10].StartS != 60 {
			t.Fatalf("breath 11 starts at %g, want 60", truths[10].StartS)
		}
		for i, w := range want {
			got := (truths[10+i].TrappedML/1000 - v0) / (cf.trappedL - v0)
			near(t, fmt.Sprintf("breath %d after the change", i+1), got, w, 0.0005)
		}
	})
}

// TestFractionExhaled checks passive mono-exponential emptying from the
// samples: after one and three time constants 63.2 % and 95.0 % of the
// tidal volume is out (1 − e^(−n), [derived from the linear
// single-compartment model, Bates 2009]; the "two thirds in one time
// constant" rule is common practice).
func TestFractionExhaled(t *testing.T) {
	// τ = 10 × 0.05 = 0.5 s; Te = 9 s = 18 τ, so nothing is trapped.
	samples, truths, err := Run(Steady{RCmH2OSPerL: 10, CMLPerCmH2O: 50, VtML: 500, InspTimeS: 1,
		RateBPM: 6, PEEPCmH2O: 5, SampleRateHz: 1000, DurationS: 30}.Scenario())
	if err != nil {
		t.Fatal(err)
	}
	tr := truths[1]
	for _, c := range []struct{ n, want float64 }{{1, 0.632}, {3, 0.950}} {
		end := tr.StartS + tr.TiS + c.n*tr.TauS
		var exhaled float64
		for i := 1; i < len(samples); i++ {
			a, b := samples[i-1], samples[i]
			if a.TimeS >= tr.StartS+tr.TiS && b.TimeS <= end+1e-9 {
				exhaled -= (a.FlowLPS + b.FlowLPS) / 2 * (b.TimeS - a.TimeS)
			}
		}
		near(t, fmt.Sprintf("fraction after %g τ", c.n), exhaled/(tr.VtML/1000), c.want, 0.002)
	}
}

// TestMassBalance checks from the samples that at steady state the volume
// breathed in equals the volume breathed out, within 0.5 %, under heavy
// trapping (conservation of volume in the single-compartment model, Bates
// 2009).
func TestMassBalance(t *testing.T) {
	samples, truths, err := Run(Steady{RCmH2OSPerL: 25, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45,
		RateBPM: 24, PEEPCmH2O: 5, SampleRateHz: 1000, DurationS: 60}.Scenario())
	if err != nil {
		t.Fatal(err)
	}
	from, to := truths[10].StartS, truths[len(truths)-1].EndS
	var in, out float64
	for i := 1; i < len(samples); i++ {
		a := samples[i-1]
		if a.TimeS < from-1e-9 || a.TimeS >= to-1e-9 {
			continue
		}
		dt := samples[i].TimeS - a.TimeS
		if a.FlowLPS > 0 {
			in += a.FlowLPS * dt
		} else {
			out -= a.FlowLPS * dt
		}
	}
	within(t, "expired volume", out, in, 0.005)
	within(t, "inspired volume per breath", in/float64(len(truths)-10), 0.6, 0.005)
}
