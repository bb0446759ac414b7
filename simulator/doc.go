// Package simulator is the simulated patient: a lung model driven by a
// ventilator model, seen through a sensor model, scripted by a scenario, with
// the ground truth of every breath. Detector tests, the demo and the
// end-to-end tests run against it.
//
// # Models
//
// The patient is a single compartment (resistance, compliance; the
// resistance may be flow-dependent after Rohrer, with separate expiratory
// coefficients) or two parallel compartments with different time constants
// behind an optional shared airway resistance. Either may have an
// expiratory flow limit that falls with volume, and an inspiratory muscle
// effort (a half-sine muscle pressure) that makes breaths non-passive and can
// trigger breaths. The ventilator runs volume control (square or
// decelerating flow, optional end-inspiratory pause) or pressure control
// with a linear rise time; the expiratory valve holds the set PEEP.
//
// The lung starts relaxed at the set PEEP, so trapped volume builds up over
// the first breaths as V_ss·(1 − xⁿ). The linear passive single compartment
// is stepped exactly (closed-form exponentials on each linear segment,
// split at every phase boundary), so its steady state equals the closed
// form at any sample rate. The other models use classical fourth-order
// Runge–Kutta with a fixed step per breath: a twentieth of the model's
// shortest time constant, at most DefaultStepS = 2 ms (or Scenario.StepS). Settings and patient parameters are latched at the start of each
// breath; a timeline ramp therefore moves them breath by breath.
//
// # Use in code
//
// Build a scenario (Steady for a steady passive patient from plain
// numbers, NewScenario and its fields for anything else, LoadScenario or
// Shipped for YAML files), then pull samples; nothing runs in the
// background:
//
//	sim, err := simulator.New(simulator.Steady{
//		RCmH2OSPerL: 25, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45,
//		RateBPM: 24, PEEPCmH2O: 5, SampleRateHz: 100, DurationS: 120,
//	}.Scenario())
//	if err != nil { ... }
//	for {
//		smp, ok := sim.Next() // ingest.Sample: s, cmH2O, L/s
//		if !ok {
//			break
//		}
//		for _, tr := range sim.TakeTruth() { // breaths completed so far
//			...
//		}
//	}
//
// Read fills a batch of samples; Run collects a whole scenario at once.
// TakeLinkEvents reports when a scripted disconnection stops the samples
// and when they come back. The same scenario and seed always give the same
// samples, bit for bit.
//
// # Ground truth
//
// Truth holds, per completed breath, the true mechanics and pressures
// computed from the model state (not from the samples). Trapped volume is
// the volume above the relaxation volume at the set PEEP at the end of the
// breath's expiration; intrinsic PEEP is that volume over the total
// compliance (the static value an end-expiratory occlusion reads); plateau
// is the static end-inspiratory recoil. For the Rohrer model R is the
// inspiratory resistance at the mean inspiratory flow and τ is C times the
// expiratory resistance at the end-expiratory flow; for two compartments R
// is the shared resistance plus the parallel resistance of the units, C
// their sum, τ = R·C, and TauFastS and TauSlowS are the two time constants
// of passive exhalation. Labels name the conditions truly present; see the
// Label constants for their rules.
//
// The package may import ingest, analyze and alerts; nothing in it is
// imported by analyze or alerts.
package simulator
