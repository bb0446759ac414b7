package simulator

import (
	"math"
	"math/rand/v2"
)

// sensor turns the true airway pressure and flow into readings: offset and
// linear drift, a pressure-driven leak, white Gaussian noise, artifact bursts and quantization, in
// that order. Every random number comes from one PCG generator seeded from
// the scenario seed, drawn in a fixed order per sample, so the same seed
// gives the same readings.
type sensor struct {
	rng *rand.Rand
}

func newSensor(seed uint64) sensor {
	// The second PCG word is a fixed odd constant: the seed alone picks the
	// sequence.
	return sensor{rng: rand.New(rand.NewPCG(seed, 0x9e3779b97f4a7c15))}
}

// jitter returns the offset of a sampling instant from its nominal time.
func (s *sensor) jitter(cfg *Sensor, periodS float64) float64 {
	if cfg.JitterS == 0 {
		return 0
	}
	lim := 0.4 * periodS
	return math.Max(-lim, math.Min(lim, s.rng.NormFloat64()*cfg.JitterS))
}

// dropped decides whether a sample is lost.
func (s *sensor) dropped(cfg *Sensor) bool {
	return cfg.DropProbability > 0 && s.rng.Float64() < cfg.DropProbability
}

// read applies the sensor to the true values at time t; art holds the noise
// of an artifact burst in progress (zero when none).
func (s *sensor) read(cfg *Sensor, t, pawCmH2O, flowLPS float64, art window) (pCmH2O, fLPS float64) {
	p := pawCmH2O + cfg.PressureOffsetCmH2O + cfg.PressureDriftCmH2OPerH*t/3600
	fLPM := flowLPS*60 + cfg.FlowOffsetLPM + cfg.FlowDriftLPMPerH*t/3600 + cfg.LeakLPMPerCmH2O*pawCmH2O
	if cfg.PressureNoiseCmH2O > 0 {
		p += s.rng.NormFloat64() * cfg.PressureNoiseCmH2O
	}
	if cfg.FlowNoiseLPM > 0 {
		fLPM += s.rng.NormFloat64() * cfg.FlowNoiseLPM
	}
	if art.pressureCmH2O > 0 {
		p += s.rng.NormFloat64() * art.pressureCmH2O
	}
	if art.flowLPM > 0 {
		fLPM += s.rng.NormFloat64() * art.flowLPM
	}
	if q := cfg.PressureStepCmH2O; q > 0 {
		p = math.Round(p/q) * q
	}
	if q := cfg.FlowStepLPM; q > 0 {
		fLPM = math.Round(fLPM/q) * q
	}
	return p, fLPM / 60
}
