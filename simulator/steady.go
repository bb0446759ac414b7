package simulator

// Steady is a passive single-compartment patient with constant mechanics on
// square-flow volume control, from plain numbers: the quickest way to a
// scenario for a grid of test conditions. Zero values take the defaults
// noted beside them.
type Steady struct {
	RCmH2OSPerL float64
	CMLPerCmH2O float64
	VtML        float64
	// FlowLPM is the inspiratory flow; when zero, InspTimeS sets it.
	FlowLPM float64
	// InspTimeS is the inspiratory time including the pause.
	InspTimeS float64
	PauseS    float64
	RateBPM   float64
	PEEPCmH2O float64
	// SampleRateHz defaults to 100.
	SampleRateHz float64
	// DurationS defaults to 120.
	DurationS float64
	// PressureNoiseCmH2O and FlowNoiseLPM are the sensor noise standard
	// deviations (zero: noiseless).
	PressureNoiseCmH2O float64
	FlowNoiseLPM       float64
	Seed               uint64
	// Stream defaults to "sim".
	Stream string
}

// Scenario turns the steady patient into a scenario.
func (p Steady) Scenario() Scenario {
	sc := NewScenario()
	sc.Name = "steady"
	sc.Description = "steady passive patient"
	if p.Stream != "" {
		sc.Stream = p.Stream
	}
	sc.Seed = p.Seed
	sc.SampleRateHz = p.SampleRateHz
	if sc.SampleRateHz == 0 {
		sc.SampleRateHz = 100
	}
	sc.DurationS = Seconds(p.DurationS)
	if sc.DurationS == 0 {
		sc.DurationS = 120
	}
	sc.Patient.ResistanceCmH2OSPerL = p.RCmH2OSPerL
	sc.Patient.ComplianceMLPerCmH2O = p.CMLPerCmH2O
	sc.Ventilator = Ventilator{
		Mode:          ModeVC,
		FlowPattern:   FlowSquare,
		TidalVolumeML: p.VtML,
		FlowLPM:       p.FlowLPM,
		InspTimeS:     p.InspTimeS,
		PauseS:        p.PauseS,
		RateBPM:       p.RateBPM,
		PEEPCmH2O:     p.PEEPCmH2O,
	}
	sc.Sensor = Sensor{PressureNoiseCmH2O: p.PressureNoiseCmH2O, FlowNoiseLPM: p.FlowNoiseLPM}
	return sc
}
