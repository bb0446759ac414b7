package analyze

import (
	"math"
	"math/rand/v2"

	"trapline/ingest"
)

// linearVC generates the exact solution of the linear single-compartment
// equation of motion, P = R·V' + V/C + PEEP (Bates, Lung Mechanics, 2009),
// under volume control with square flow, an optional end-inspiratory pause
// and passive exhalation to PEEP. Between breaths the end-expiratory volume
// follows V_ee(n+1) = (V_ee(n) + VT)·exp(−Te/τ), whose fixed point is the
// steady-state trapped volume VT·x/(1 − x) of the linear single-compartment model, docs/formulas.md. It is the
// outside reference of the analyzer tests: a closed form, not the analyzer.
type linearVC struct {
	R      float64 // cmH2O·s/L
	C      float64 // L/cmH2O
	PEEP   float64 // cmH2O
	VT     float64 // L
	Rate   float64 // /min
	TFlow  float64 // s of inspiratory flow
	Pause  float64 // s
	Fs     float64 // Hz
	Offset float64 // start of the sample grid, s (sub-sample phase)
	// Steady starts in the steady state; otherwise from relaxation volume.
	Steady bool
	// Noise standard deviations; 0 for exact samples.
	NoiseP, NoiseF float64
	Seed           uint64
}

// truth is the ground truth of one breath of linearVC.
type truth struct {
	StartS, TeS, TauS  float64
	TrappedL, PEEPi    float64
	EEFLPS             float64
	Pplat, Ppeak, Ptot float64
}

func (m linearVC) period() float64 { return 60 / m.Rate }
func (m linearVC) te() float64     { return m.period() - m.TFlow - m.Pause }
func (m linearVC) tau() float64    { return m.R * m.C }

// vee returns the volume above relaxation at the start of breath k.
func (m linearVC) vee(k int) float64 {
	x := math.Exp(-m.te() / m.tau())
	if m.Steady {
		return m.VT * x / (1 - x)
	}
	v := 0.0
	for i := 0; i < k; i++ {
		v = (v + m.VT) * x
	}
	return v
}

// truthOf returns breath k's ground truth.
func (m linearVC) truthOf(k int) truth {
	v0 := m.vee(k)
	f := m.VT / m.TFlow
	x := math.Exp(-m.te() / m.tau())
	vend := (v0 + m.VT) * x // at the end of this breath
	return truth{
		StartS: float64(k) * m.period(), TeS: m.te(), TauS: m.tau(),
		TrappedL: vend, PEEPi: vend / m.C, EEFLPS: vend / m.tau(),
		Pplat: m.PEEP + (v0+m.VT)/m.C, Ppeak: m.PEEP + (v0+m.VT)/m.C + m.R*f,
		Ptot: m.PEEP + v0/m.C,
	}
}

// at returns pressure and flow at time t ≥ 0.
func (m linearVC) at(t float64) (p, f float64) {
	T := m.period()
	k := int(math.Floor(t / T))
	s := t - float64(k)*T
	v0 := m.vee(k)
	fi := m.VT / m.TFlow
	switch {
	case s < m.TFlow:
		return m.PEEP + m.R*fi + (v0+fi*s)/m.C, fi
	case s < m.TFlow+m.Pause:
		return m.PEEP + (v0+m.VT)/m.C, 0
	default:
		x := (v0 + m.VT) * math.Exp(-(s-m.TFlow-m.Pause)/m.tau())
		return m.PEEP, -x / m.tau()
	}
}

// samples returns n breaths of samples.
func (m linearVC) samples(breaths int) []ingest.Sample {
	rng := rand.New(rand.NewPCG(m.Seed, 7))
	dt := 1 / m.Fs
	n := int(float64(breaths) * m.period() * m.Fs)
	out := make([]ingest.Sample, 0, n)
	for i := 0; i < n; i++ {
		t := m.Offset + float64(i)*dt
		p, f := m.at(t)
		if m.NoiseP > 0 {
			p += rng.NormFloat64() * m.NoiseP
		}
		if m.NoiseF > 0 {
			f += rng.NormFloat64() * m.NoiseF
		}
		out = append(out, ingest.Sample{TimeS: t, PressureCmH2O: p, FlowLPS: f, VolumeL: ingest.NoVolume})
	}
	return out
}

// run pushes samples through a fresh analyzer with cfg and returns the breaths.
func run(cfg Config, in []ingest.Sample) []Breath {
	a := NewAnalyzer("test", cfg)
	var out []Breath
	for _, s := range in {
		if b, ok := a.Push(s); ok {
			out = append(out, b)
		}
	}
	return out
}
