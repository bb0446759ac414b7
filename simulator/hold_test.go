package simulator

import (
	"math"
	"slices"
	"testing"
)

// TestExpiratoryHold holds the expiration of a linear single compartment
// in its periodic steady state under square-flow volume control (R 20,
// C 50, VT 500 mL at 30 L/min, 20 /min, PEEP 5) for 3 s. With both valves
// shut no gas flows and the alveolar pressure, which the airway now reads,
// stays at PEEP + intrinsic PEEP: the closed form of solveClosedForm
// (Marini, Crooke and Truwit 1989). The held breath's truth carries the
// hold, its expiration includes it, its end-expiratory flow is the flow as
// the valves shut (the closed form's trapped volume over τ), and the next
// breath starts when the hold ends.
func TestExpiratoryHold(t *testing.T) {
	sc := Steady{RCmH2OSPerL: 20, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 30, RateBPM: 20, PEEPCmH2O: 5,
		SampleRateHz: 100, DurationS: 90}.Scenario()
	sc.Timeline = []Step{{AtS: 60, Event: EventExpiratoryHold, DurationS: 3}}
	cf := solveClosedForm(20, 0.05, 0.5, 0.5, 0, 20, 5)
	samples, truths, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	var held *Truth
	for i := range truths {
		if truths[i].ExpHoldS != 0 {
			if held != nil {
				t.Fatalf("two held breaths, at %v and %v s", held.StartS, truths[i].StartS)
			}
			held = &truths[i]
		}
	}
	if held == nil {
		t.Fatal("no held breath")
	}
	// Breaths of 3 s from 0: the first expiration to end at or after 60 s
	// is the one ending at 60 s.
	near(t, "held breath start", held.StartS, 57, 1e-9)
	near(t, "held breath end", held.EndS, 63, 1e-9)
	near(t, "hold", held.ExpHoldS, 3, 1e-9)
	near(t, "expiration", held.TeS, cf.te+3, 1e-9)
	within(t, "intrinsic PEEP", held.PEEPiCmH2O, cf.peepi, 0.002)
	within(t, "end-expiratory flow, L/min", held.EndExpFlowLPM, cf.eefLPS*60, 0.002)
	for _, s := range samples {
		if s.TimeS <= 60 || s.TimeS >= 63 {
			continue
		}
		near(t, "flow in the hold", s.FlowLPS, 0, 1e-12)
		near(t, "pressure in the hold", s.PressureCmH2O, 5+cf.peepi, 0.01*cf.peepi)
	}
	if !slices.ContainsFunc(truths, func(tr Truth) bool { return math.Abs(tr.StartS-63) < 1e-9 }) {
		t.Error("no breath starts when the hold ends, at 63 s")
	}
}

// TestExpiratoryHoldTwoUnits holds the expiration of two parallel units
// whose time constants differ ten times for 20 s, several of their exchange
// time constants: the airway pressure at the end of the hold must be the
// compliance-weighted mean of the units' pressures at its start, the static
// total PEEP of the truth (the parallel units of Otis et al. 1956: with no
// flow at the airway, the units' volumes only move between them).
func TestExpiratoryHoldTwoUnits(t *testing.T) {
	sc := Steady{RCmH2OSPerL: 20, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 30, RateBPM: 20, PEEPCmH2O: 5,
		SampleRateHz: 100, DurationS: 100}.Scenario()
	sc.Patient.Model = ModelTwoCompartment
	sc.Patient.ResistanceCmH2OSPerL, sc.Patient.Resistance2CmH2OSPerL = 24, 240
	sc.Patient.ExpResistanceCmH2OSPerL = 24
	sc.Patient.ComplianceMLPerCmH2O, sc.Patient.Compliance2MLPerCmH2O = 25, 25
	sc.Timeline = []Step{{AtS: 60, Event: EventExpiratoryHold, DurationS: 20}}
	samples, truths, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	var held Truth
	for _, tr := range truths {
		if tr.ExpHoldS != 0 {
			held = tr
		}
	}
	if held.ExpHoldS != 20 {
		t.Fatalf("held breath: %+v", held)
	}
	// τ of the exchange: (R1 + R2)·C1·C2/(C1 + C2) = 264·0.0125 = 3.3 s;
	// 20 s is six of them, e^−6 of the first difference is left.
	var first, last float64
	for _, s := range samples {
		if s.TimeS > held.EndS-held.ExpHoldS && first == 0 {
			first = s.PressureCmH2O
		}
		if s.TimeS < held.EndS {
			last = s.PressureCmH2O
		}
	}
	want := 5 + held.PEEPiCmH2O
	near(t, "pressure at the end of the hold", last, want, 0.01*held.PEEPiCmH2O+math.Exp(-6)*math.Abs(want-first))
	if !(want-first > 0.1*held.PEEPiCmH2O) {
		t.Errorf("pressure at the start of the hold %.3f cmH2O, static %.3f: the units should still differ", first, want)
	}
}
