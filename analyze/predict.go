package analyze

import (
	"errors"
	"fmt"
	"math"
)

// Steady-state what-if predictions for volume-controlled ventilation with
// square flow in a passive, linear single-compartment patient. With
// x = exp(−Te/τ) the volume above relaxation at end-expiration settles at
// V_trap = VT·x/(1 − x) and the intrinsic PEEP at V_trap/C (derived from the
// equation of motion; analogous closed forms for pressure-preset ventilation
// in Marini, Crooke, Truwit, J Appl Physiol 1989;67:1081). Predictions are
// model outputs: they ignore flow limitation, heterogeneous time constants
// and patient effort, all of which make trapping worse than predicted.

// TeForTrapped returns the expiratory time (s) that brings the steady-state
// trapped volume of a tidal volume vtML with time constant tauS down to
// targetML: solving VT·x/(1 − x) ≤ target gives Te = τ·ln(1 + VT/target).
// It returns NaN when an input is not positive and finite.
func TeForTrapped(vtML, tauS, targetML float64) float64 {
	if !positive(vtML) || !positive(tauS) || !positive(targetML) {
		return math.NaN()
	}
	return tauS * math.Log1p(vtML/targetML)
}

// SteadyTrappedML returns the steady-state trapped volume (mL) of tidal
// volume vtML exhaled for teS with time constant tauS: VT·x/(1 − x).
func SteadyTrappedML(vtML, tauS, teS float64) float64 {
	if !positive(vtML) || !positive(tauS) || !positive(teS) {
		return math.NaN()
	}
	x := math.Exp(-teS / tauS)
	return vtML * x / (1 - x)
}

func positive(v float64) bool { return v > 0 && !math.IsInf(v, 0) }

// Settings are volume-control settings with square inspiratory flow. Give
// either FlowLPM or InspTimeS (the time of flow, without the pause); the
// other is derived from VtML.
type Settings struct {
	VtML      float64
	FlowLPM   float64
	InspTimeS float64
	PauseS    float64
	RateBPM   float64
	PEEPCmH2O float64
}

// Patient is the linear single-compartment patient of a prediction.
type Patient struct {
	RCmH2OSPerL float64
	CMLPerCmH2O float64
	// DeadSpaceML is the physiological dead space used for alveolar
	// ventilation; common practice takes about 150 mL for an adult.
	DeadSpaceML float64
}

// Prediction is the steady state of a patient under one set of settings.
type Prediction struct {
	Settings        Settings // with both FlowLPM and InspTimeS filled in
	TauS            float64
	TeS             float64
	TeOverTau       float64
	TrappedML       float64
	PEEPiCmH2O      float64
	PlateauCmH2O    float64
	PeakCmH2O       float64
	MinuteVolLPM    float64
	AlveolarVentLPM float64
	// PaCO2Factor is the expected PaCO2 under these settings over PaCO2
	// under the current ones (see WithCO2; NaN until set), and PaCO2MmHg
	// the expected value when the current one is known.
	PaCO2Factor float64
	PaCO2MmHg   float64
	// Warnings say which flags of the breaths relied on make the
	// prediction less certain (see PredictWarnings).
	Warnings []string
}

// ErrSettings is returned (wrapped) for settings that cannot be ventilated.
var ErrSettings = errors.New("impossible settings")

// Resolve fills in whichever of FlowLPM and InspTimeS is missing and checks
// that the breath fits in the cycle.
func (s Settings) Resolve() (Settings, error) {
	switch {
	case !positive(s.VtML):
		return s, fmt.Errorf("%w: tidal volume %g mL must be positive", ErrSettings, s.VtML)
	case !positive(s.RateBPM):
		return s, fmt.Errorf("%w: rate %g /min must be positive", ErrSettings, s.RateBPM)
	case s.PauseS < 0 || math.IsNaN(s.PauseS) || math.IsInf(s.PauseS, 0):
		return s, fmt.Errorf("%w: pause %g s must not be negative", ErrSettings, s.PauseS)
	case math.IsNaN(s.PEEPCmH2O) || math.IsInf(s.PEEPCmH2O, 0) || s.PEEPCmH2O < 0:
		return s, fmt.Errorf("%w: PEEP %g cmH2O must not be negative", ErrSettings, s.PEEPCmH2O)
	}
	switch {
	case positive(s.FlowLPM):
		s.InspTimeS = s.VtML / 1000 / (s.FlowLPM / 60)
	case positive(s.InspTimeS):
		s.FlowLPM = 60 * s.VtML / 1000 / s.InspTimeS
	default:
		return s, fmt.Errorf("%w: give a positive inspiratory flow or inspiratory time", ErrSettings)
	}
	if te := 60/s.RateBPM - s.InspTimeS - s.PauseS; !(te > 0) {
		return s, fmt.Errorf("%w: inspiration %.2f s + pause %.2f s leaves no expiration at %g /min", ErrSettings, s.InspTimeS, s.PauseS, s.RateBPM)
	}
	return s, nil
}

// Predict returns the steady state of patient pt under settings s.
func Predict(pt Patient, s Settings) (Prediction, error) {
	if !positive(pt.RCmH2OSPerL) || !positive(pt.CMLPerCmH2O) {
		return Prediction{}, fmt.Errorf("%w: R %g and C %g must be positive", ErrSettings, pt.RCmH2OSPerL, pt.CMLPerCmH2O)
	}
	s, err := s.Resolve()
	if err != nil {
		return Prediction{}, err
	}
	var p Prediction
	p.PaCO2Factor, p.PaCO2MmHg = math.NaN(), math.NaN()
	p.Settings = s
	cL := pt.CMLPerCmH2O / 1000
	p.TauS = pt.RCmH2OSPerL * cL
	p.TeS = 60/s.RateBPM - s.InspTimeS - s.PauseS
	p.TeOverTau = p.TeS / p.TauS
	p.TrappedML = SteadyTrappedML(s.VtML, p.TauS, p.TeS)
	p.PEEPiCmH2O = p.TrappedML / pt.CMLPerCmH2O
	// Pplat = PEEP + PEEPi + VT/C; Ppeak = Pplat + R·V' (derived from the
	// equation of motion at the end of the pause and at peak flow).
	p.PlateauCmH2O = s.PEEPCmH2O + p.PEEPiCmH2O + s.VtML/pt.CMLPerCmH2O
	p.PeakCmH2O = p.PlateauCmH2O + pt.RCmH2OSPerL*s.FlowLPM/60
	p.MinuteVolLPM = s.VtML / 1000 * s.RateBPM
	p.AlveolarVentLPM = math.Max(0, (s.VtML-pt.DeadSpaceML)/1000*s.RateBPM)
	return p, nil
}

// PaCO2Ratio returns the expected ratio of PaCO2 under the candidate to
// PaCO2 under the current settings from the alveolar ventilation equation
// (West, Respiratory Physiology): with CO2 production and dead space
// constant, PaCO2 is inversely proportional to alveolar ventilation. NaN
// when either has no alveolar ventilation.
func PaCO2Ratio(current, candidate Prediction) float64 {
	if !(current.AlveolarVentLPM > 0) || !(candidate.AlveolarVentLPM > 0) {
		return math.NaN()
	}
	return current.AlveolarVentLPM / candidate.AlveolarVentLPM
}

// RateForTrapped returns the highest rate (breaths/min) at which settings s
// (flow, tidal volume and pause kept) bring the steady-state trapped volume
// of time constant tauS under targetML; NaN when no rate does.
func RateForTrapped(s Settings, tauS, targetML float64) float64 {
	s, err := s.Resolve()
	if err != nil {
		return math.NaN()
	}
	te := TeForTrapped(s.VtML, tauS, targetML)
	if math.IsNaN(te) {
		return math.NaN()
	}
	return 60 / (s.InspTimeS + s.PauseS + te)
}

// FlowForTrapped returns the lowest square inspiratory flow (L/min) that, at
// the rate, tidal volume and pause of s, leaves an expiration long enough to
// bring the steady-state trapped volume under targetML; NaN when no flow
// does (the pause and the needed expiration already fill the cycle).
func FlowForTrapped(s Settings, tauS, targetML float64) float64 {
	if !positive(s.RateBPM) || !positive(s.VtML) {
		return math.NaN()
	}
	te := TeForTrapped(s.VtML, tauS, targetML)
	ti := 60/s.RateBPM - s.PauseS - te
	if math.IsNaN(ti) || !(ti > 0) {
		return math.NaN()
	}
	return 60 * s.VtML / 1000 / ti
}

// PaCO2Factor returns the expected ratio of PaCO2 after a change of rate
// and tidal volume to PaCO2 before it, from the alveolar ventilation
// equation at constant CO2 production and dead space (West JB, Respiratory
// Physiology): PaCO2 ∝ VCO2/VA with VA = RR·(VT − VD), so
// PaCO2_new/PaCO2_old = VA_old/VA_new. NaN when either alveolar
// ventilation is not positive.
func PaCO2Factor(rateOldBPM, vtOldML, rateNewBPM, vtNewML, deadSpaceML float64) float64 {
	vaOld := rateOldBPM * (vtOldML - deadSpaceML)
	vaNew := rateNewBPM * (vtNewML - deadSpaceML)
	if !(vaOld > 0) || !(vaNew > 0) || math.IsInf(vaOld, 0) || math.IsInf(vaNew, 0) {
		return math.NaN()
	}
	return vaOld / vaNew
}

// WithCO2 returns p with its CO2 consequence against the current
// settings' prediction base filled in: PaCO2Factor, and PaCO2MmHg when the
// current PaCO2 (mmHg) is known (paco2MmHg > 0).
func (p Prediction) WithCO2(base Prediction, paco2MmHg float64) Prediction {
	p.PaCO2Factor = PaCO2Ratio(base, p)
	p.PaCO2MmHg = math.NaN()
	if paco2MmHg > 0 {
		p.PaCO2MmHg = paco2MmHg * p.PaCO2Factor
	}
	return p
}

// Flags whose breaths make a single-compartment what-if unreliable, and
// what each means for the prediction.
var predictCaveats = []struct{ flag, why string }{
	{FlagPEEPiBound, "two time constants: trapping is worse than a single time constant predicts"},
	{FlagTauNonlinear, "the expiration does not follow one time constant"},
	{FlagEffort, "the patient is not passive"},
	{FlagRohrer, "the resistance depends on flow"},
	{FlagTauUnreliable, "no usable time constant"},
	{FlagLeak, "a leak the correction did not remove"},
}

// PredictWarnings returns one warning per kind of flag that the breaths a
// prediction relies on carry, with how many carry it, and whether the
// prediction should be refused: more than half of the breaths without a
// usable time constant or passive mechanics.
func PredictWarnings(bs []Breath) (warnings []string, refuse bool) {
	if len(bs) == 0 {
		return nil, true
	}
	bad := 0
	for i := range bs {
		if bs[i].HasFlag(FlagEffort) || bs[i].HasFlag(FlagTauUnreliable) || bs[i].HasFlag(FlagFitSingular) || bs[i].HasFlag(FlagFitImplausible) {
			bad++
		}
	}
	for _, c := range predictCaveats {
		n := 0
		for i := range bs {
			if bs[i].HasFlag(c.flag) {
				n++
			}
		}
		if n > 0 {
			warnings = append(warnings, fmt.Sprintf("%d of %d breaths flagged %s: %s", n, len(bs), c.flag, c.why))
		}
	}
	return warnings, 2*bad > len(bs)
}
