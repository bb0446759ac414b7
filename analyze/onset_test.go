package analyze_test

import (
	"math"
	"slices"
	"testing"

	"trapline/analyze"
	"trapline/simulator"
)

// TestEndExpirationUnderPressureRise: under pressure control the
// ventilator starts its pressure rise while the flow is still expiratory.
// Just before that onset a passive linear single compartment has
// V'ee = −V_trap/τ (derived from the equation of motion with the airway at
// PEEP), so the end-expiratory flow read at the onset must equal the
// simulator's trapped volume over τ = R·C whatever the rise time, and the
// intrinsic PEEP must follow (R·|V'ee| = V_trap/C). At 25 and 50 Hz a
// sample of a 0.4 s rise is 1.5 and 0.75 cmH2O apart, so the sample before
// the onset may already be on the rise: the window must end where the rise
// meets the baseline, not at that sample.
func TestEndExpirationUnderPressureRise(t *testing.T) {
	for _, tt := range []struct{ rise, fsHz float64 }{
		{0, 100}, {0.15, 100}, {0.3, 100}, {0.4, 100}, {0.3, 25}, {0.4, 25}, {0.4, 50},
	} {
		rise := tt.rise
		base := simulator.Steady{RCmH2OSPerL: 40, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 20, PEEPCmH2O: 5,
			SampleRateHz: tt.fsHz, DurationS: 60, PressureNoiseCmH2O: 0.1, FlowNoiseLPM: 0.3, Seed: 3}
		sc := base.Scenario()
		sc.Ventilator = simulator.Ventilator{Mode: simulator.ModePC, InspPressureCmH2O: 15, InspTimeS: 1,
			RiseTimeS: rise, RateBPM: 20, PEEPCmH2O: 5}
		var eefErr, eefBias, peepiErr []float64
		for _, p := range simulate(t, sc) {
			if p.tr.Seq < 5 {
				continue
			}
			tau := 0.040 * 50
			want := 60 * p.tr.TrappedML / 1000 / tau
			eefErr = append(eefErr, math.Abs(p.b.EndExpFlowLPM-want))
			eefBias = append(eefBias, p.b.EndExpFlowLPM-want)
			peepiErr = append(peepiErr, math.Abs(p.b.PEEPiCmH2O-p.tr.PEEPiCmH2O))
		}
		if len(eefErr) < 10 {
			t.Fatalf("rise %g s, %g Hz: only %d breaths", rise, tt.fsHz, len(eefErr))
		}
		t.Logf("rise %g s, %g Hz: median |EEF − V_trap/τ| %.2f L/min (signed %.2f), intrinsic PEEP error %.2f cmH2O", rise, tt.fsHz, median(eefErr), median(eefBias), median(peepiErr))
		// Measured 3 December 2026: at most 0.24 L/min, a signed median
		// within ±0.05 and 0.11 cmH2O; with the window ending at the
		// sample before the onset, 0.57 L/min (signed −0.21) and
		// 0.18 cmH2O at 25 Hz, −0.27 L/min signed at 0.4 s and 100 Hz.
		if m := median(eefErr); m > 0.3 {
			t.Errorf("rise %g s, %g Hz: median |EEF − V_trap/τ| %.2f L/min, want ≤ 0.3", rise, tt.fsHz, m)
		}
		if m := median(eefBias); math.Abs(m) > 0.15 {
			t.Errorf("rise %g s, %g Hz: median EEF − V_trap/τ %.2f L/min, want within ±0.15 (the rise read as expiration)", rise, tt.fsHz, m)
		}
		if m := median(peepiErr); m > 0.15 {
			t.Errorf("rise %g s, %g Hz: median intrinsic PEEP error %.2f cmH2O, want ≤ 0.15", rise, tt.fsHz, m)
		}
	}
}

// TestSettingsChangeInferred: a rate change from 20 to 26 /min at 60 s is
// read from the waveform and reported once, as "rate-up", within a few
// breaths; the mode is read as volume control throughout.
func TestSettingsChangeInferred(t *testing.T) {
	base := simulator.Steady{RCmH2OSPerL: 10, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 20, PEEPCmH2O: 5,
		SampleRateHz: 100, DurationS: 120, PressureNoiseCmH2O: 0.1, FlowNoiseLPM: 0.3, Seed: 4}
	sc := base.Scenario()
	sc.Timeline = append(sc.Timeline, simulator.Step{AtS: 60, Ventilator: map[string]float64{"rate_bpm": 26}})
	var at []float64
	for _, p := range simulate(t, sc) {
		if p.b.Mode != analyze.ModeVolume {
			t.Errorf("breath %d: mode %q, want vc", p.b.Seq, p.b.Mode)
		}
		if len(p.b.SettingsChanged) > 0 {
			if !slices.Equal(p.b.SettingsChanged, []string{"rate-up"}) {
				t.Errorf("breath at %.1f s: changes %v, want [rate-up]", p.b.StartS, p.b.SettingsChanged)
			}
			at = append(at, p.b.StartS)
		}
	}
	if len(at) != 1 || at[0] < 60 || at[0] > 60+5*60.0/26 {
		t.Errorf("changes reported at %v s, want once within 5 breaths after 60 s", at)
	}
}
