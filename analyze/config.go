package analyze

import (
	"fmt"
	"math"
)

// Config holds the thresholds of breath segmentation and of the per-breath
// fits. The defaults follow common practice for adult volume- and
// pressure-controlled ventilation (see docs/analysis.md for the reasons);
// every key can be set in the config file under analysis.<key>.
type Config struct {
	// TriggerFlowLPM is the flow a phase change must exceed, in the new
	// direction, before it counts (hysteresis against noise); L/min.
	TriggerFlowLPM float64 `mapstructure:"trigger_flow_lpm"`
	// TriggerFraction lowers the trigger flow for breaths whose own flows
	// are small: after an inspiration, the expiration that follows it and
	// the next inspiration count at this fraction of its peak flow, when
	// that is below TriggerFlowLPM, and not below MinTriggerFlowLPM. Zero
	// keeps TriggerFlowLPM fixed.
	TriggerFraction   float64 `mapstructure:"trigger_fraction"`
	MinTriggerFlowLPM float64 `mapstructure:"min_trigger_flow_lpm"`
	// HoldS is how long the flow must stay beyond TriggerFlowLPM to confirm
	// a phase change.
	HoldS float64 `mapstructure:"hold_s"`
	// MinPhaseS is the shortest inspiration or expiration accepted; a
	// reversal sooner than this is treated as part of the current phase.
	MinPhaseS float64 `mapstructure:"min_phase_s"`
	// MinBreathVolumeML marks breaths with a smaller inspired volume "short".
	MinBreathVolumeML float64 `mapstructure:"min_breath_volume_ml"`
	// MaxBreathS drops a breath that has not completed after this long (apnea,
	// flat line, disconnected sensor) so that no breath spans it.
	MaxBreathS float64 `mapstructure:"max_breath_s"`
	// MaxGapS is the largest step between sample times that is not a gap; a
	// longer step resets segmentation.
	MaxGapS float64 `mapstructure:"max_gap_s"`

	// PauseFlowLPM and PauseFlowFraction define an end-inspiratory pause:
	// smoothed |flow| below the larger of PauseFlowLPM and PauseFlowFraction
	// of the peak inspiratory flow.
	PauseFlowLPM      float64 `mapstructure:"pause_flow_lpm"`
	PauseFlowFraction float64 `mapstructure:"pause_flow_fraction"`
	// MinPauseS is the shortest end-inspiratory pause that yields a plateau.
	MinPauseS float64 `mapstructure:"min_pause_s"`
	// PlateauWindowS is the end of the pause averaged for the plateau.
	PlateauWindowS float64 `mapstructure:"plateau_window_s"`
	// EndExpWindowS is the end of expiration used for end-expiratory pressure
	// (mean) and flow (line fit extrapolated to the end of the breath).
	EndExpWindowS float64 `mapstructure:"end_exp_window_s"`

	// MinFitR2 is the smallest r² of the equation-of-motion fit that is
	// reported; below it R, C and P0 are null and the breath is flagged.
	MinFitR2 float64 `mapstructure:"min_fit_r2"`
	// MaxRCmH2OSPerL and MaxCMLPerCmH2O bound plausible fitted values.
	MaxRCmH2OSPerL float64 `mapstructure:"max_r_cmh2o_s_per_l"`
	MaxCMLPerCmH2O float64 `mapstructure:"max_c_ml_per_cmh2o"`
	// EffortDipCmH2O is the largest departure of the inspiratory pressure
	// (averaged over 0.2 s) from the passive equation of motion fitted to
	// the inspiration that still counts as passive; beyond it (and beyond
	// four times the noise of that average) the breath is flagged "effort".
	EffortDipCmH2O float64 `mapstructure:"effort_dip_cmh2o"`
	// LeakFraction flags a breath whose expired volume falls short of the
	// inspired volume by more than this fraction.
	LeakFraction float64 `mapstructure:"leak_fraction"`
	// PEEPiToleranceCmH2O and PEEPiToleranceFraction bound the disagreement
	// between the two intrinsic PEEP estimates (flow × R and P0 − PEEP)
	// before the breath is flagged "peepi-mismatch": the larger applies.
	PEEPiToleranceCmH2O    float64 `mapstructure:"peepi_tolerance_cmh2o"`
	PEEPiToleranceFraction float64 `mapstructure:"peepi_tolerance_fraction"`
	// ExpHoldMinS and ExpHoldFlowLPM recognise an end-expiratory hold: an
	// expiration ending in at least ExpHoldMinS of |flow| within
	// ExpHoldFlowLPM, in a breath that much longer than the set cycle,
	// with the airway pressure risen above the PEEP (see expHold).
	ExpHoldMinS    float64 `mapstructure:"exp_hold_min_s"`
	ExpHoldFlowLPM float64 `mapstructure:"exp_hold_flow_lpm"`
}

// DefaultConfig returns the thresholds documented in docs/analysis.md.
func DefaultConfig() Config {
	return Config{
		TriggerFlowLPM:         3,
		TriggerFraction:        0.2,
		MinTriggerFlowLPM:      1,
		HoldS:                  0.05,
		MinPhaseS:              0.15,
		MinBreathVolumeML:      30,
		MaxBreathS:             30,
		MaxGapS:                0.5,
		PauseFlowLPM:           3,
		PauseFlowFraction:      0.05,
		MinPauseS:              0.15,
		PlateauWindowS:         0.1,
		EndExpWindowS:          0.1,
		MinFitR2:               0.9,
		MaxRCmH2OSPerL:         200,
		MaxCMLPerCmH2O:         500,
		EffortDipCmH2O:         0.5,
		LeakFraction:           0.2,
		PEEPiToleranceCmH2O:    2,
		PEEPiToleranceFraction: 0.3,
		ExpHoldMinS:            1,
		ExpHoldFlowLPM:         2,
	}
}

// Validate reports every key outside its allowed range, each as
// "prefix.key: problem (allowed range)". prefix is the path of the section in
// the config file, e.g. "analysis"; it may be empty.
func (c Config) Validate(prefix string) []error {
	var errs []error
	full := func(key string) string {
		if prefix == "" {
			return key
		}
		return prefix + "." + key
	}
	check := func(key string, v, lo, hi float64, loOpen bool) {
		name := full(key)
		bad := math.IsNaN(v) || v > hi || v < lo || (loOpen && v == lo)
		if !bad {
			return
		}
		open := "["
		if loOpen {
			open = "("
		}
		errs = append(errs, fmt.Errorf("%s: %g is out of range (allowed %s%g, %g])", name, v, open, lo, hi))
	}
	check("trigger_flow_lpm", c.TriggerFlowLPM, 0, 60, true)
	check("trigger_fraction", c.TriggerFraction, 0, 0.5, false)
	check("min_trigger_flow_lpm", c.MinTriggerFlowLPM, 0, 60, true)
	check("hold_s", c.HoldS, 0, 0.5, false)
	check("min_phase_s", c.MinPhaseS, 0, 3, false)
	check("min_breath_volume_ml", c.MinBreathVolumeML, 0, 1000, false)
	check("max_breath_s", c.MaxBreathS, 1, 600, false)
	check("max_gap_s", c.MaxGapS, 0, 60, true)
	check("pause_flow_lpm", c.PauseFlowLPM, 0, 30, true)
	check("pause_flow_fraction", c.PauseFlowFraction, 0, 0.5, false)
	check("min_pause_s", c.MinPauseS, 0, 3, true)
	check("plateau_window_s", c.PlateauWindowS, 0, 1, true)
	check("end_exp_window_s", c.EndExpWindowS, 0, 1, true)
	check("min_fit_r2", c.MinFitR2, 0, 1, false)
	check("max_r_cmh2o_s_per_l", c.MaxRCmH2OSPerL, 0, 10000, true)
	check("max_c_ml_per_cmh2o", c.MaxCMLPerCmH2O, 0, 100000, true)
	check("effort_dip_cmh2o", c.EffortDipCmH2O, 0, 100, true)
	check("leak_fraction", c.LeakFraction, 0, 1, true)
	check("peepi_tolerance_cmh2o", c.PEEPiToleranceCmH2O, 0, 100, false)
	check("peepi_tolerance_fraction", c.PEEPiToleranceFraction, 0, 10, false)
	check("exp_hold_min_s", c.ExpHoldMinS, 0.2, 20, false)
	check("exp_hold_flow_lpm", c.ExpHoldFlowLPM, 0, 30, true)
	if len(errs) == 0 && c.MinTriggerFlowLPM > c.TriggerFlowLPM {
		errs = append(errs, fmt.Errorf("%s: %g is above trigger_flow_lpm %g (allowed (0, trigger_flow_lpm])",
			full("min_trigger_flow_lpm"), c.MinTriggerFlowLPM, c.TriggerFlowLPM))
	}
	if len(errs) == 0 && c.PlateauWindowS > c.MinPauseS {
		errs = append(errs, fmt.Errorf("%s: %g is longer than min_pause_s %g (allowed (0, min_pause_s])",
			full("plateau_window_s"), c.PlateauWindowS, c.MinPauseS))
	}
	return errs
}
