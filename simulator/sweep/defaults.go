package sweep

import "trapline/simulator"

// defaultSettings are four adult volume-control settings from an easy
// expiration to a short one (our choice): inspiratory flow and rate set the
// expiratory time, and so how much of the grid traps air.
func defaultSettings() []Setting {
	vc := func(name string, vt, flow, rate, pause float64) Setting {
		return Setting{Name: name, Ventilator: simulator.Ventilator{Mode: simulator.ModeVC, FlowPattern: simulator.FlowSquare,
			TidalVolumeML: vt, FlowLPM: flow, RateBPM: rate, PauseS: pause, PEEPCmH2O: 5}}
	}
	return []Setting{
		vc("vt450-rr14-pause", 450, 50, 14, 0.3),
		vc("vt500-rr20", 500, 45, 20, 0),
		vc("vt600-rr24", 600, 40, 24, 0),
		vc("vt550-rr28", 550, 60, 28, 0),
	}
}

// defaultNoise is a clean sensor and a noisy one (our choice: typical and
// poor bench flow sensors).
func defaultNoise() []Noise {
	return []Noise{
		{Name: "clean", Sensor: simulator.Sensor{PressureNoiseCmH2O: 0.1, FlowNoiseLPM: 0.3}},
		{Name: "noisy", Sensor: simulator.Sensor{PressureNoiseCmH2O: 0.5, FlowNoiseLPM: 2, FlowOffsetLPM: 0.5}},
	}
}

// defaultCourse worsens the airways for the middle third of the run and
// then relieves them: a bronchospasm-like doubling of resistance over two
// minutes at one third, back to nominal at two thirds.
func defaultCourse() []CourseStep {
	return []CourseStep{
		{AtFraction: 1.0 / 3, RampS: 120, ResistanceFactor: 2},
		{AtFraction: 2.0 / 3, RampS: 0, ResistanceFactor: 1},
	}
}

// DefaultGrid is the grid `trapline sweep` runs without a grid file: 5
// models × 4 resistances × 3 compliances × 4 settings × 2 noise levels = 480
// patients of 65 minutes, plus every shipped scenario with two seeds: over
// 500 simulated patient-hours at 50 Hz.
func DefaultGrid() Grid {
	return Grid{
		DurationS:     65 * 60,
		SampleRatesHz: []float64{50},
		StepS:         0.004,
		Seeds:         1,
		// The 3× and 10× two-compartment models are left to grid files
		// (docs/sweep-acceptance.yaml) to keep the default run's size.
		Models:               []string{ModelLinear, ModelRohrer, ModelTwoCompartment, ModelFlowLimited, ModelEffort},
		ResistanceCmH2OSPerL: []float64{8, 15, 25, 35},
		ComplianceMLPerCmH2O: []float64{30, 50, 80},
		Settings:             defaultSettings(),
		Noise:                defaultNoise(),
		Course:               defaultCourse(),
		Scenarios:            []string{"all"},
		Episodes:             DefaultEpisodes(),
	}
}
