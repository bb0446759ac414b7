package analyze_test

import (
	"math"
	"testing"

	"trapline/simulator"
)

// TestBalancePEEPStep steps the set PEEP of a linear single-compartment lung
// from 5 to 7 cmH2O on a clean sensor. The lung then keeps C·ΔPEEP = 100 mL
// (mass balance of a linear compartment: above its relaxation volume it holds
// C·(PEEP + PEEPi) at the end of expiration; derived), which the flow offset
// and leak estimate must not read as a sensor error: the correction stays
// under 0.4 L/min and 0.02 L/min per cmH2O (before the change of
// end-expiratory pressure was taken out of the balance: 2.3 L/min and 0.24)
// and intrinsic PEEP within 0.3 cmH2O of the simulator's truth, an
// independent integration of the same lung.
func TestBalancePEEPStep(t *testing.T) {
	sc := simulator.NewScenario()
	sc.SampleRateHz = 50
	sc.DurationS = 240
	sc.Patient.ResistanceCmH2OSPerL, sc.Patient.ComplianceMLPerCmH2O = 15, 50
	sc.Ventilator = simulator.Ventilator{Mode: simulator.ModePC, InspPressureCmH2O: 15, InspTimeS: 1,
		RateBPM: 20, PEEPCmH2O: 5}
	sc.Timeline = []simulator.Step{{AtS: 120, Ventilator: map[string]float64{"peep_cmh2o": 7}}}
	worstOff, worstLeak, worstPEEPi := 0.0, 0.0, 0.0
	n := 0
	for _, p := range simulate(t, sc) {
		if p.b.StartS < 60 {
			continue // the estimate needs about 10 breaths to start
		}
		n++
		worstOff = math.Max(worstOff, math.Abs(p.b.FlowOffsetLPM))
		worstLeak = math.Max(worstLeak, p.b.LeakLPMPerCmH2O)
		worstPEEPi = math.Max(worstPEEPi, math.Abs(p.b.PEEPiCmH2O-p.tr.PEEPiCmH2O))
	}
	if n < 50 {
		t.Fatalf("only %d breaths matched", n)
	}
	t.Logf("%d breaths after the first minute: offset up to %.2f L/min, leak up to %.3f L/min per cmH2O, intrinsic PEEP off by up to %.2f cmH2O",
		n, worstOff, worstLeak, worstPEEPi)
	if worstOff > 0.4 || worstLeak > 0.02 || worstPEEPi > 0.3 {
		t.Errorf("after the PEEP step: offset up to %.2f L/min, leak up to %.3f L/min per cmH2O, intrinsic PEEP off by up to %.2f cmH2O; want ≤ 0.4, ≤ 0.02 and ≤ 0.3",
			worstOff, worstLeak, worstPEEPi)
	}
}
