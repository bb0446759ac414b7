package simulator

import (
	"errors"
	"fmt"
	"math"
	"reflect"
	"sort"
	"strings"
)

// Patient models, the values of Patient.Model.
const (
	// ModelSingle is one resistance and one compliance; the resistance is
	// linear unless a Rohrer K2 coefficient is set.
	ModelSingle = "single"
	// ModelTwoCompartment is two parallel resistance–compliance units behind
	// an optional shared airway resistance.
	ModelTwoCompartment = "two-compartment"
)

// Ventilation modes, the values of Ventilator.Mode.
const (
	// ModeVC is volume control: a set tidal volume delivered at a set flow.
	ModeVC = "vc"
	// ModePC is pressure control: a set inspiratory pressure above PEEP,
	// reached over a rise time and held for the inspiratory time.
	ModePC = "pc"
)

// Inspiratory flow patterns in volume control, the values of
// Ventilator.FlowPattern.
const (
	// FlowSquare holds the inspiratory flow constant.
	FlowSquare = "square"
	// FlowDecelerating ramps the flow down linearly from the set (peak)
	// flow to DecelEndFraction of it.
	FlowDecelerating = "decelerating"
)

// Patient describes the simulated respiratory system. Volumes are counted
// from the relaxation volume at zero airway pressure, so the elastic recoil
// of a compartment is its volume divided by its compliance.
type Patient struct {
	// Model is ModelSingle (default) or ModelTwoCompartment.
	Model string `yaml:"model" json:"model"`
	// ResistanceCmH2OSPerL is the airway resistance of the single model
	// (the Rohrer K1 coefficient during inspiration) or the resistance of
	// compartment 1 of the two-compartment model.
	ResistanceCmH2OSPerL float64 `yaml:"resistance_cmh2o_s_per_l" json:"resistance_cmh2o_s_per_l"`
	// ComplianceMLPerCmH2O is the compliance of the single model or of
	// compartment 1.
	ComplianceMLPerCmH2O float64 `yaml:"compliance_ml_per_cmh2o" json:"compliance_ml_per_cmh2o"`

	// K2CmH2OS2PerL2 is the inspiratory Rohrer coefficient of the single
	// model: ΔP = K1·V' + K2·V'·|V'| (Rohrer 1915). Zero keeps it linear.
	K2CmH2OS2PerL2 float64 `yaml:"k2_cmh2o_s2_per_l2" json:"k2_cmh2o_s2_per_l2"`
	// ExpResistanceCmH2OSPerL is the expiratory K1; NaN (the default when
	// absent) means the same as ResistanceCmH2OSPerL.
	ExpResistanceCmH2OSPerL float64 `yaml:"exp_resistance_cmh2o_s_per_l" json:"exp_resistance_cmh2o_s_per_l"`
	// ExpK2CmH2OS2PerL2 is the expiratory K2; NaN (the default when absent)
	// means the same as K2CmH2OS2PerL2.
	ExpK2CmH2OS2PerL2 float64 `yaml:"exp_k2_cmh2o_s2_per_l2" json:"exp_k2_cmh2o_s2_per_l2"`

	// Resistance2CmH2OSPerL and Compliance2MLPerCmH2O describe compartment
	// 2 of the two-compartment model.
	Resistance2CmH2OSPerL float64 `yaml:"resistance_2_cmh2o_s_per_l" json:"resistance_2_cmh2o_s_per_l"`
	Compliance2MLPerCmH2O float64 `yaml:"compliance_2_ml_per_cmh2o" json:"compliance_2_ml_per_cmh2o"`
	// AirwayResistanceCmH2OSPerL is the resistance shared by both
	// compartments of the two-compartment model (the central airway).
	AirwayResistanceCmH2OSPerL float64 `yaml:"airway_resistance_cmh2o_s_per_l" json:"airway_resistance_cmh2o_s_per_l"`

	// FlowLimitLPS and FlowLimitSlopePerS, when either is positive, cap the
	// expiratory flow (magnitude) at FlowLimitLPS + FlowLimitSlopePerS·ΔV,
	// where ΔV is the volume above the relaxation volume at the set PEEP: a
	// cap that falls as the lung empties, the signature of expiratory flow
	// limitation.
	FlowLimitLPS float64 `yaml:"flow_limit_lps" json:"flow_limit_lps"`
	// FlowLimitSlopePerS is the rise of the expiratory flow cap per litre
	// above relaxation (L/s per L).
	FlowLimitSlopePerS float64 `yaml:"flow_limit_slope_per_s" json:"flow_limit_slope_per_s"`

	// EffortCmH2O is the peak of the inspiratory muscle pressure; zero means
	// a passive patient.
	EffortCmH2O float64 `yaml:"effort_cmh2o" json:"effort_cmh2o"`
	// EffortRateBPM is the patient's own breathing rate; zero means the
	// ventilator's rate.
	EffortRateBPM float64 `yaml:"effort_rate_bpm" json:"effort_rate_bpm"`
	// EffortTimeS is the duration of one effort (half-sine); zero means 0.8 s.
	EffortTimeS float64 `yaml:"effort_time_s" json:"effort_time_s"`
	// EffortOffsetS is the time of the first effort onset.
	EffortOffsetS float64 `yaml:"effort_offset_s" json:"effort_offset_s"`
}

// Ventilator holds the ventilator settings in clinical units.
type Ventilator struct {
	// Mode is ModeVC (default) or ModePC.
	Mode string `yaml:"mode" json:"mode"`
	// TidalVolumeML is the set tidal volume (volume control).
	TidalVolumeML float64 `yaml:"tidal_volume_ml" json:"tidal_volume_ml"`
	// FlowLPM is the set inspiratory flow (the peak flow of a decelerating
	// pattern). When zero, the flow follows from InspTimeS.
	FlowLPM float64 `yaml:"flow_lpm" json:"flow_lpm"`
	// InspTimeS is the inspiratory time including any pause. In volume
	// control it is used only when FlowLPM is zero; in pressure control it
	// is always used.
	InspTimeS float64 `yaml:"insp_time_s" json:"insp_time_s"`
	// PauseS is the end-inspiratory pause (volume control).
	PauseS float64 `yaml:"pause_s" json:"pause_s"`
	// FlowPattern is FlowSquare (default) or FlowDecelerating.
	FlowPattern string `yaml:"flow_pattern" json:"flow_pattern"`
	// DecelEndFraction is the end flow of a decelerating ramp as a fraction
	// of the peak flow; zero means 0.25.
	DecelEndFraction float64 `yaml:"decel_end_fraction" json:"decel_end_fraction"`
	// RateBPM is the set (mandatory) rate.
	RateBPM float64 `yaml:"rate_bpm" json:"rate_bpm"`
	// PEEPCmH2O is the set PEEP, held by the expiratory valve.
	PEEPCmH2O float64 `yaml:"peep_cmh2o" json:"peep_cmh2o"`
	// InspPressureCmH2O is the inspiratory pressure above PEEP (pressure
	// control).
	InspPressureCmH2O float64 `yaml:"insp_pressure_cmh2o" json:"insp_pressure_cmh2o"`
	// RiseTimeS is the time for the pressure to reach its set level
	// (pressure control), a linear ramp.
	RiseTimeS float64 `yaml:"rise_time_s" json:"rise_time_s"`
	// TriggerLPM is the inspiratory flow that lets the patient trigger a
	// breath during expiration; zero disables patient triggering.
	TriggerLPM float64 `yaml:"trigger_lpm" json:"trigger_lpm"`
}

// Sensor describes the imperfections of the measurement chain. The zero
// value is a perfect sensor.
type Sensor struct {
	// PressureNoiseCmH2O and FlowNoiseLPM are the standard deviations of
	// white Gaussian noise.
	PressureNoiseCmH2O float64 `yaml:"pressure_noise_cmh2o" json:"pressure_noise_cmh2o"`
	FlowNoiseLPM       float64 `yaml:"flow_noise_lpm" json:"flow_noise_lpm"`
	// PressureOffsetCmH2O and FlowOffsetLPM are constant offsets.
	PressureOffsetCmH2O float64 `yaml:"pressure_offset_cmh2o" json:"pressure_offset_cmh2o"`
	FlowOffsetLPM       float64 `yaml:"flow_offset_lpm" json:"flow_offset_lpm"`
	// PressureDriftCmH2OPerH and FlowDriftLPMPerH add an offset that grows
	// linearly with time.
	PressureDriftCmH2OPerH float64 `yaml:"pressure_drift_cmh2o_per_h" json:"pressure_drift_cmh2o_per_h"`
	FlowDriftLPMPerH       float64 `yaml:"flow_drift_lpm_per_h" json:"flow_drift_lpm_per_h"`
	// PressureStepCmH2O and FlowStepLPM quantize the readings (zero: none).
	PressureStepCmH2O float64 `yaml:"pressure_step_cmh2o" json:"pressure_step_cmh2o"`
	FlowStepLPM       float64 `yaml:"flow_step_lpm" json:"flow_step_lpm"`
	// JitterS is the standard deviation of the sampling instant around its
	// nominal time (clipped to ±40 % of the sample period so that samples
	// stay in order).
	JitterS float64 `yaml:"jitter_s" json:"jitter_s"`
	// DropProbability is the chance that a sample is lost.
	DropProbability float64 `yaml:"drop_probability" json:"drop_probability"`
	// LeakLPMPerCmH2O is a leak between the flow sensor and the patient
	// (a cuff or circuit leak) through a linear orifice: the sensor reads
	// the patient's flow plus LeakLPMPerCmH2O·Paw, so inspired volume
	// exceeds expired volume by the leak's share of ∫Paw dt.
	LeakLPMPerCmH2O float64 `yaml:"leak_lpm_per_cmh2o" json:"leak_lpm_per_cmh2o"`
}

// expResistance is the expiratory K1: NaN means the inspiratory one, so
// that a timeline that changes the resistance changes both.
func (p *Patient) expResistance() float64 {
	if math.IsNaN(p.ExpResistanceCmH2OSPerL) {
		return p.ResistanceCmH2OSPerL
	}
	return p.ExpResistanceCmH2OSPerL
}

// expK2 is the expiratory K2: NaN means the inspiratory one.
func (p *Patient) expK2() float64 {
	if math.IsNaN(p.ExpK2CmH2OS2PerL2) {
		return p.K2CmH2OS2PerL2
	}
	return p.ExpK2CmH2OS2PerL2
}

// params is everything a breath latches at its start.
type params struct {
	Patient    Patient
	Ventilator Ventilator
	Sensor     Sensor
}

// resolve fills the defaults that depend on other fields.
func (p *params) resolve() {
	pt := &p.Patient
	if pt.Model == "" {
		pt.Model = ModelSingle
	}
	v := &p.Ventilator
	if v.Mode == "" {
		v.Mode = ModeVC
	}
	if v.FlowPattern == "" {
		v.FlowPattern = FlowSquare
	}
}

// validate reports every problem at once, each prefixed by its key.
func (p *params) validate() error {
	var errs []error
	bad := func(format string, args ...any) { errs = append(errs, fmt.Errorf(format, args...)) }
	finite := func(section string, s any) {
		rv := reflect.ValueOf(s)
		for i := range rv.NumField() {
			f := rv.Field(i)
			if f.Kind() != reflect.Float64 {
				continue
			}
			name := yamlName(rv.Type().Field(i))
			if math.IsNaN(f.Float()) && (name == "exp_resistance_cmh2o_s_per_l" || name == "exp_k2_cmh2o_s2_per_l2") {
				continue // NaN: the same as the inspiratory coefficient
			}
			if math.IsNaN(f.Float()) || math.IsInf(f.Float(), 0) {
				bad("%s.%s: not a finite number", section, yamlName(rv.Type().Field(i)))
			}
		}
	}
	finite("patient", p.Patient)
	finite("ventilator", p.Ventilator)
	finite("sensor", p.Sensor)
	if len(errs) > 0 {
		return errors.Join(errs...)
	}
	validatePatient(p.Patient, bad)

	v := p.Ventilator
	if v.RateBPM <= 0 || v.RateBPM > 100 {
		bad("ventilator.rate_bpm: %g out of range (0, 100]", v.RateBPM)
	}
	if v.PEEPCmH2O < 0 || v.PEEPCmH2O > 40 {
		bad("ventilator.peep_cmh2o: %g out of range [0, 40]", v.PEEPCmH2O)
	}
	if v.PauseS < 0 || v.RiseTimeS < 0 || v.TriggerLPM < 0 {
		bad("ventilator.pause_s, rise_time_s, trigger_lpm: must not be negative")
	}
	validateMode(v, bad)
	if len(errs) == 0 {
		if ti := inspTimeS(v); ti >= 60/v.RateBPM-minExpTimeS {
			bad("ventilator: inspiratory time %.3g s leaves less than %.2g s for expiration at %g /min", ti, minExpTimeS, v.RateBPM)
		}
	}

	s := p.Sensor
	for _, x := range []struct {
		name string
		v    float64
	}{
		{"pressure_noise_cmh2o", s.PressureNoiseCmH2O}, {"flow_noise_lpm", s.FlowNoiseLPM},
		{"pressure_step_cmh2o", s.PressureStepCmH2O}, {"flow_step_lpm", s.FlowStepLPM},
		{"jitter_s", s.JitterS}, {"leak_lpm_per_cmh2o", s.LeakLPMPerCmH2O},
	} {
		if x.v < 0 {
			bad("sensor.%s: %g must not be negative", x.name, x.v)
		}
	}
	if s.DropProbability < 0 || s.DropProbability >= 1 {
		bad("sensor.drop_probability: %g out of range [0, 1)", s.DropProbability)
	}
	return errors.Join(errs...)
}

// validatePatient reports to bad every out-of-range patient setting,
// each prefixed by its key.
func validatePatient(pt Patient, bad func(format string, args ...any)) {
	switch pt.Model {
	case ModelSingle, ModelTwoCompartment:
	default:
		bad("patient.model: unknown model %q (want %s or %s)", pt.Model, ModelSingle, ModelTwoCompartment)
	}
	if pt.ResistanceCmH2OSPerL <= 0 || pt.ResistanceCmH2OSPerL > 1000 {
		bad("patient.resistance_cmh2o_s_per_l: %g out of range (0, 1000]", pt.ResistanceCmH2OSPerL)
	}
	if pt.ComplianceMLPerCmH2O <= 0 || pt.ComplianceMLPerCmH2O > 5000 {
		bad("patient.compliance_ml_per_cmh2o: %g out of range (0, 5000]", pt.ComplianceMLPerCmH2O)
	}
	if pt.K2CmH2OS2PerL2 < 0 || pt.expK2() < 0 {
		bad("patient.k2_cmh2o_s2_per_l2, exp_k2_cmh2o_s2_per_l2: must not be negative")
	}
	if pt.expResistance() <= 0 || pt.expResistance() > 1000 {
		bad("patient.exp_resistance_cmh2o_s_per_l: %g out of range (0, 1000]", pt.ExpResistanceCmH2OSPerL)
	}
	if pt.Model == ModelTwoCompartment {
		if pt.Resistance2CmH2OSPerL <= 0 || pt.Resistance2CmH2OSPerL > 1000 {
			bad("patient.resistance_2_cmh2o_s_per_l: %g out of range (0, 1000]", pt.Resistance2CmH2OSPerL)
		}
		if pt.Compliance2MLPerCmH2O <= 0 || pt.Compliance2MLPerCmH2O > 5000 {
			bad("patient.compliance_2_ml_per_cmh2o: %g out of range (0, 5000]", pt.Compliance2MLPerCmH2O)
		}
		if pt.K2CmH2OS2PerL2 != 0 || pt.expK2() != 0 || pt.expResistance() != pt.ResistanceCmH2OSPerL {
			bad("patient.k2_cmh2o_s2_per_l2, exp_*: Rohrer and expiratory coefficients apply to model %s only", ModelSingle)
		}
	}
	if pt.AirwayResistanceCmH2OSPerL < 0 {
		bad("patient.airway_resistance_cmh2o_s_per_l: %g must not be negative", pt.AirwayResistanceCmH2OSPerL)
	}
	if pt.FlowLimitLPS < 0 || pt.FlowLimitSlopePerS < 0 {
		bad("patient.flow_limit_lps, flow_limit_slope_per_s: must not be negative")
	}
	if pt.EffortCmH2O < 0 || pt.EffortCmH2O > 50 {
		bad("patient.effort_cmh2o: %g out of range [0, 50]", pt.EffortCmH2O)
	}
	if pt.EffortRateBPM < 0 || pt.EffortRateBPM > 80 {
		bad("patient.effort_rate_bpm: %g out of range [0, 80]", pt.EffortRateBPM)
	}
	if pt.EffortTimeS < 0 || pt.EffortOffsetS < 0 {
		bad("patient.effort_time_s, effort_offset_s: must not be negative")
	}
}

// validateMode reports to bad an unknown ventilation mode and every
// out-of-range setting of the mode in force, each prefixed by its key.
func validateMode(v Ventilator, bad func(format string, args ...any)) {
	switch v.Mode {
	case ModeVC:
		if v.TidalVolumeML <= 0 || v.TidalVolumeML > 3000 {
			bad("ventilator.tidal_volume_ml: %g out of range (0, 3000]", v.TidalVolumeML)
		}
		if v.FlowLPM < 0 || v.FlowLPM > 300 {
			bad("ventilator.flow_lpm: %g out of range [0, 300]", v.FlowLPM)
		}
		if v.FlowLPM == 0 && v.InspTimeS <= v.PauseS {
			bad("ventilator: set flow_lpm, or insp_time_s longer than pause_s")
		}
		switch v.FlowPattern {
		case FlowSquare, FlowDecelerating:
		default:
			bad("ventilator.flow_pattern: unknown pattern %q (want %s or %s)", v.FlowPattern, FlowSquare, FlowDecelerating)
		}
		if v.DecelEndFraction < 0 || v.DecelEndFraction > 1 {
			bad("ventilator.decel_end_fraction: %g out of range [0, 1]", v.DecelEndFraction)
		}
	case ModePC:
		if v.InspPressureCmH2O <= 0 || v.InspPressureCmH2O > 80 {
			bad("ventilator.insp_pressure_cmh2o: %g out of range (0, 80]", v.InspPressureCmH2O)
		}
		if v.InspTimeS <= 0 {
			bad("ventilator.insp_time_s: %g must be positive in pressure control", v.InspTimeS)
		}
		if v.RiseTimeS > v.InspTimeS {
			bad("ventilator.rise_time_s: %g longer than insp_time_s %g", v.RiseTimeS, v.InspTimeS)
		}
	default:
		bad("ventilator.mode: unknown mode %q (want %s or %s)", v.Mode, ModeVC, ModePC)
	}
}

// minExpTimeS is the shortest expiration the settings may leave.
const minExpTimeS = 0.1

// inspFlowLPS returns the set (peak) inspiratory flow of volume control in
// L/s and the time the flow lasts.
func inspFlow(v Ventilator) (peakLPS, flowTimeS float64) {
	vt := v.TidalVolumeML / 1000
	mean := 1.0 // mean flow as a fraction of the peak
	if v.FlowPattern == FlowDecelerating {
		mean = (1 + decelEnd(v)) / 2
	}
	if v.FlowLPM > 0 {
		peakLPS = v.FlowLPM / 60
		return peakLPS, vt / (peakLPS * mean)
	}
	flowTimeS = v.InspTimeS - v.PauseS
	return vt / (flowTimeS * mean), flowTimeS
}

// decelEnd is the end fraction of a decelerating ramp with its default.
func decelEnd(v Ventilator) float64 {
	if v.DecelEndFraction == 0 {
		return 0.25
	}
	return v.DecelEndFraction
}

// inspTimeS is the whole inspiratory time (flow and pause, or the pressure
// control inspiratory time).
func inspTimeS(v Ventilator) float64 {
	if v.Mode == ModePC {
		return v.InspTimeS
	}
	_, tf := inspFlow(v)
	return tf + v.PauseS
}

// yamlName is the YAML key of a struct field.
func yamlName(f reflect.StructField) string {
	name, _, _ := strings.Cut(f.Tag.Get("yaml"), ",")
	return name
}

// numericKeys maps the YAML key of every numeric setting of a section to
// its field index, for the scenario timeline.
func numericKeys(section any) map[string]int {
	t := reflect.TypeOf(section)
	keys := map[string]int{}
	for i := range t.NumField() {
		if t.Field(i).Type.Kind() == reflect.Float64 {
			keys[yamlName(t.Field(i))] = i
		}
	}
	return keys
}

var (
	patientKeys    = numericKeys(Patient{})
	ventilatorKeys = numericKeys(Ventilator{})
	sensorKeys     = numericKeys(Sensor{})
)

// sortedKeys lists a key set for error messages.
func sortedKeys(m map[string]int) string {
	ks := make([]string, 0, len(m))
	for k := range m {
		ks = append(ks, k)
	}
	sort.Strings(ks)
	return strings.Join(ks, ", ")
}
