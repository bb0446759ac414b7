package simulator

import (
	"fmt"
	"math"
	"testing"
)

// runNumeric runs a scenario with the Runge–Kutta integrator forced on and
// returns the ground truth.
func runNumeric(t *testing.T, sc Scenario) []Truth {
	t.Helper()
	s, err := New(sc)
	if err != nil {
		t.Fatal(err)
	}
	s.numeric, s.exact = true, false
	for {
		if _, ok := s.Next(); !ok {
			break
		}
	}
	return s.TakeTruth()
}

// halfStep returns the scenario with half the Runge–Kutta step that the
// simulator chooses for its first breath.
func halfStep(t *testing.T, sc Scenario) Scenario {
	t.Helper()
	s, err := New(sc)
	if err != nil {
		t.Fatal(err)
	}
	if s.breathStepS <= 0 || s.exact {
		t.Fatalf("scenario is not integrated numerically (step %g)", s.breathStepS)
	}
	sc.StepS = s.breathStepS / 2
	return sc
}

func steadyScenario(r, c, vt, flow, rate, peep, dur float64) Scenario {
	return Steady{RCmH2OSPerL: r, CMLPerCmH2O: c, VtML: vt, FlowLPM: flow, RateBPM: rate,
		PEEPCmH2O: peep, SampleRateHz: 50, DurationS: dur}.Scenario()
}

// TestRK4MatchesClosedForm runs the linear model through the Runge–Kutta
// path and compares with the closed form of Marini, Crooke, Truwit, J Appl
// Physiol 1989;67:1081.
func TestRK4MatchesClosedForm(t *testing.T) {
	for _, c := range []struct{ r, c, vt, flow, rate float64 }{{25, 60, 600, 45, 24}, {60, 70, 500, 60, 16}, {5, 50, 500, 30, 20}} {
		t.Run(fmt.Sprintf("R%g_C%g", c.r, c.c), func(t *testing.T) {
			cf := solveClosedForm(c.r, c.c/1000, c.vt/1000, c.flow/60, 0, c.rate, 5)
			tr := runNumeric(t, steadyScenario(c.r, c.c, c.vt, c.flow, c.rate, 5, 120))
			last := tr[len(tr)-1]
			if cf.trappedL > 0.001 {
				within(t, "trapped_ml", last.TrappedML, cf.trappedL*1000, 0.005)
			}
			// [derived from the linear single-compartment model, Bates 2009]
			within(t, "pip_cmh2o", last.PeakCmH2O, cf.ppeak, 0.001)
		})
	}
}

// TestPressureControlClosedForm checks pressure control without rise time
// against the closed forms of pressure-preset ventilation (Marini, Crooke,
// Truwit, J Appl Physiol 1989;67:1081): with a = e^(−Ti/τ), x = e^(−Te/τ),
// VT = C·ΔP·(1 − a)(1 − x)/(1 − a·x) and trapped = x·C·ΔP·(1 − a)/(1 − a·x).
// With a rise time the integrator must agree with the exact stepping.
func TestPressureControlClosedForm(t *testing.T) {
	for _, c := range []struct{ r, c, dp, ti, rate float64 }{{25, 60, 15, 1, 20}, {10, 40, 20, 0.9, 25}, {40, 80, 12, 1.2, 18}} {
		t.Run(fmt.Sprintf("R%g_C%g_dP%g", c.r, c.c, c.dp), func(t *testing.T) {
			sc := steadyScenario(c.r, c.c, 0, 0, c.rate, 5, 150)
			sc.Ventilator = Ventilator{Mode: ModePC, InspPressureCmH2O: c.dp, InspTimeS: c.ti, RateBPM: c.rate, PEEPCmH2O: 5}
			_, truths, err := Run(sc)
			if err != nil {
				t.Fatal(err)
			}
			last := truths[len(truths)-1]
			cl, tau := c.c/1000, c.r*c.c/1000
			a, x := math.Exp(-c.ti/tau), math.Exp(-(60/c.rate-c.ti)/tau)
			within(t, "vt_ml", last.VtML, 1000*cl*c.dp*(1-a)*(1-x)/(1-a*x), 0.001)
			within(t, "trapped_ml", last.TrappedML, 1000*x*cl*c.dp*(1-a)/(1-a*x), 0.005)
			near(t, "pip_cmh2o", last.PeakCmH2O, 5+c.dp, 1e-9)

			sc.Ventilator.RiseTimeS = 0.2
			_, exact, err := Run(sc)
			if err != nil {
				t.Fatal(err)
			}
			num := runNumeric(t, sc)
			e, n := exact[len(exact)-1], num[len(num)-1]
			within(t, "rise: trapped_ml, Runge–Kutta vs exact", n.TrappedML, e.TrappedML, 0.001)
			within(t, "rise: vt_ml, Runge–Kutta vs exact", n.VtML, e.VtML, 0.001)
			if !(e.VtML < last.VtML) {
				t.Errorf("a rise time must lower the tidal volume: %g vs %g", e.VtML, last.VtML)
			}
		})
	}
}

// TestDeceleratingFlow: the volume delivered sets the trapped volume
// whatever the flow pattern, so the closed form still holds (Marini,
// Crooke, Truwit 1989), and the peak pressure is lower than with a square
// flow at the same peak flow and Ti ([derived from the linear
// single-compartment model, Bates 2009]).
func TestDeceleratingFlow(t *testing.T) {
	sc := steadyScenario(25, 60, 600, 0, 24, 5, 120)
	sc.Ventilator.InspTimeS = 0.8
	sc.Ventilator.FlowPattern = FlowDecelerating
	_, truths, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	last := truths[len(truths)-1]
	cf := solveClosedForm(25, 0.06, 0.6, 0.75, 0, 24, 5)
	within(t, "trapped_ml", last.TrappedML, cf.trappedL*1000, 0.005)
	within(t, "vt_ml", last.VtML, 600, 1e-6)
	// Peak flow is 0.6/(0.8·0.625) = 1.2 L/s falling to 0.3 L/s: the end of
	// the ramp gives Pplat + R·0.3 and the start PEEP + PEEPi + R·1.2.
	want := math.Max(cf.pplat+25*0.3, 5+cf.peepi+25*1.2)
	if last.PeakCmH2O < want-1e-6 {
		t.Errorf("pip_cmh2o = %g, want at least %g", last.PeakCmH2O, want)
	}
}

// rohrerSteadyTrapped solves the steady state of a passive Rohrer lung
// under square-flow volume control without the simulator. With
// K1·f + K2·f² = P (f the expiratory flow magnitude, P the recoil above
// PEEP) and dP/dt = −f/C, the time to fall from flow f0 to f is
// C·[K1·ln(f0/f) + 2·K2·(f0 − f)] ([derived from the Rohrer equation,
// Rohrer 1915, and the single-compartment model, Bates 2009]). Bisection on
// the end-expiratory recoil finds the one whose expiration lasts Te.
func rohrerSteadyTrapped(k1, k2, cL, vtL, te float64) float64 {
	flow := func(p float64) float64 { return 2 * p / (k1 + math.Sqrt(k1*k1+4*k2*p)) }
	duration := func(pee float64) float64 {
		f0, f := flow(pee+vtL/cL), flow(pee)
		return cL * (k1*math.Log(f0/f) + 2*k2*(f0-f))
	}
	lo, hi := 1e-9, 200.0 // duration falls as pee rises
	for range 200 {
		mid := (lo + hi) / 2
		if duration(mid) > te {
			lo = mid
		} else {
			hi = mid
		}
	}
	return (lo + hi) / 2 * cL
}

// TestRohrerSteadyState compares the flow-dependent resistance model with
// the closed-form expiration time above, and checks that halving the
// Runge–Kutta step changes the trapped volume by less than 0.5 %.
func TestRohrerSteadyState(t *testing.T) {
	for _, c := range []struct{ k1, k2, k1e, k2e float64 }{{10, 5, 10, 5}, {8, 10, 12, 15}, {20, 3, 20, 3}} {
		t.Run(fmt.Sprintf("K1 %g K2 %g exp %g %g", c.k1, c.k2, c.k1e, c.k2e), func(t *testing.T) {
			sc := steadyScenario(c.k1, 60, 600, 45, 24, 5, 120)
			sc.Patient.K2CmH2OS2PerL2, sc.Patient.ExpResistanceCmH2OSPerL, sc.Patient.ExpK2CmH2OS2PerL2 = c.k2, c.k1e, c.k2e
			tr := lastTruth(t, sc)
			want := rohrerSteadyTrapped(c.k1e, c.k2e, 0.06, 0.6, 1.7)
			within(t, "trapped_ml", tr.TrappedML, want*1000, 0.005)
			// Inspiratory drop at the square flow of 0.75 L/s, [derived].
			within(t, "pip_cmh2o", tr.PeakCmH2O, tr.PlateauCmH2O+c.k1*0.75+c.k2*0.75*0.75, 0.001)
			within(t, "r_cmh2o_s_per_l at the mean flow", tr.RCmH2OSPerL, c.k1+c.k2*0.75, 1e-9)
			sc = halfStep(t, sc)
			half := lastTruth(t, sc)
			within(t, "trapped_ml at half step", half.TrappedML, tr.TrappedML, 0.005)
		})
	}
}

// TestTwoCompartment checks the parallel model against two exact
// reductions ([derived from the two-compartment parallel model, Otis et al.
// 1956]): two identical units R_u, C_u behind R0 behave as one compartment
// with R = R0 + R_u/2 and C = 2·C_u (so the Marini closed form holds); and
// with R0 = 0 each unit empties on its own, so the two time constants of
// exhalation are R1·C1 and R2·C2.
func TestTwoCompartment(t *testing.T) {
	t.Run("identical units reduce to one", func(t *testing.T) {
		sc := steadyScenario(0, 0, 600, 45, 24, 5, 120)
		sc.Patient = Patient{Model: ModelTwoCompartment, ResistanceCmH2OSPerL: 30, ComplianceMLPerCmH2O: 30,
			Resistance2CmH2OSPerL: 30, Compliance2MLPerCmH2O: 30, AirwayResistanceCmH2OSPerL: 10,
			ExpResistanceCmH2OSPerL: math.NaN(), ExpK2CmH2OS2PerL2: math.NaN()}
		tr := lastTruth(t, sc)
		cf := solveClosedForm(25, 0.06, 0.6, 0.75, 0, 24, 5)
		within(t, "trapped_ml", tr.TrappedML, cf.trappedL*1000, 0.005)
		within(t, "pip_cmh2o", tr.PeakCmH2O, cf.ppeak, 0.001)
		within(t, "r_cmh2o_s_per_l", tr.RCmH2OSPerL, 25, 1e-9)
		within(t, "tau_slow_s", tr.TauSlowS, 1.5, 1e-6)
	})
	t.Run("independent units", func(t *testing.T) {
		sc := steadyScenario(0, 0, 600, 45, 12, 5, 60)
		sc.Patient = Patient{Model: ModelTwoCompartment, ResistanceCmH2OSPerL: 5, ComplianceMLPerCmH2O: 30,
			Resistance2CmH2OSPerL: 40, Compliance2MLPerCmH2O: 40,
			ExpResistanceCmH2OSPerL: math.NaN(), ExpK2CmH2OS2PerL2: math.NaN()}
		tr := lastTruth(t, sc)
		within(t, "tau_fast_s", tr.TauFastS, 0.15, 1e-6)
		within(t, "tau_slow_s", tr.TauSlowS, 1.6, 1e-6)
		sc = halfStep(t, sc)
		half := lastTruth(t, sc)
		within(t, "trapped_ml at half step", half.TrappedML, tr.TrappedML, 0.005)
	})
}

// TestFlowLimitation: a cap on expiratory flow k·ΔV below the passive flow
// ΔV/τ governs the whole expiration, so the lung empties with time
// constant 1/k and the steady state is the Marini closed form with τ
// replaced by 1/k ([derived]); intrinsic PEEP then exceeds R·EEF, which is
// why end-expiratory-flow estimates fail under flow limitation (project
// reference §3).
func TestFlowLimitation(t *testing.T) {
	sc := steadyScenario(10, 60, 500, 60, 15, 5, 120) // τ = 0.6 s
	sc.Patient.FlowLimitSlopePerS = 0.8               // 1/k = 1.25 s
	tr := lastTruth(t, sc)
	x := math.Exp(-(4 - 0.5) / 1.25)
	within(t, "trapped_ml", tr.TrappedML, 500*x/(1-x), 0.005)
	within(t, "eef_lpm", tr.EndExpFlowLPM, 60*0.8*tr.TrappedML/1000, 0.005)
	if r := 10 * tr.EndExpFlowLPM / 60; !(r < 0.8*tr.PEEPiCmH2O) {
		t.Errorf("R·EEF %.2f should underestimate intrinsic PEEP %.2f", r, tr.PEEPiCmH2O)
	}
	sc = halfStep(t, sc)
	within(t, "trapped_ml at half step", lastTruth(t, sc).TrappedML, tr.TrappedML, 0.005)
}

// TestEffort checks spontaneous effort: breaths overlapping a muscle
// effort are not passive, the patient triggers breaths at its own rate
// when the trigger is on, volume control still delivers the set volume, and
// halving the step changes the trapped volume by less than 0.5 %.
func TestEffort(t *testing.T) {
	sc := steadyScenario(15, 50, 500, 50, 12, 5, 90)
	sc.Patient.EffortCmH2O, sc.Patient.EffortRateBPM, sc.Patient.EffortTimeS = 6, 20, 0.8
	sc.Ventilator.TriggerLPM = 2
	_, truths, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	var triggered int
	for _, tr := range truths[2:] {
		if tr.Passive {
			t.Errorf("breath %d is passive under effort", tr.Seq)
		}
		if tr.Triggered {
			triggered++
			if tr.RateBPM < 12 {
				t.Errorf("breath %d triggered at %g /min, below the set rate", tr.Seq, tr.RateBPM)
			}
		}
		near(t, "vt_ml", tr.VtML, 500, 1e-6)
	}
	// The patient breathes at 20 /min against a set 12 /min: most breaths
	// are triggered (common practice: assist-control follows the patient).
	if triggered < len(truths)/2 {
		t.Errorf("%d of %d breaths triggered, want most", triggered, len(truths))
	}
	sc.Ventilator.TriggerLPM = 0
	base := lastTruth(t, sc)
	sc = halfStep(t, sc)
	within(t, "trapped_ml at half step", lastTruth(t, sc).TrappedML, base.TrappedML, 0.005)
}
