package tests

import (
	"math"
	"strconv"
)

// passiveLung generates the airway pressure and flow of a passive,
// single-compartment lung under volume-controlled ventilation with constant
// inspiratory flow, in closed form. The equation of motion
// Paw = R·V' + V/C + PEEP (Bates JHT, Lung Mechanics: An Inverse Modeling
// Approach, Cambridge University Press, 2009) gives during inspiration
// Paw = PEEP + R·F + V(t)/C with V(t) = F·t, and during passive expiration
// V(t) = VT·exp(−t/τ), V' = −V/τ with τ = R·C, so that Paw = PEEP exactly.
// It is the load signal: simple, known, and cheap enough for hundreds of
// streams.
type passiveLung struct {
	RCmH2OSPerL  float64
	CLPerCmH2O   float64
	PEEPCmH2O    float64
	FlowLPS      float64 // inspiratory flow
	TiS, TeS     float64
	SampleRateHz float64
}

// defaultLung breathes 20 times a minute with 500 mL and τ = 0.5 s: Te = 4τ,
// so the lung empties (no air trapping).
var defaultLung = passiveLung{RCmH2OSPerL: 10, CLPerCmH2O: 0.05, PEEPCmH2O: 5, FlowLPS: 0.5, TiS: 1, TeS: 2, SampleRateHz: 100}

// sample returns the pressure (cmH2O) and flow (L/s) of sample n.
func (l passiveLung) sample(n int) (t, pCmH2O, fLPS float64) {
	t = float64(n) / l.SampleRateHz
	period := l.TiS + l.TeS
	tb := math.Mod(t, period)
	if tb < l.TiS {
		v := l.FlowLPS * tb
		return t, l.PEEPCmH2O + l.RCmH2OSPerL*l.FlowLPS + v/l.CLPerCmH2O, l.FlowLPS
	}
	vt := l.FlowLPS * l.TiS
	tau := l.RCmH2OSPerL * l.CLPerCmH2O
	v := vt * math.Exp(-(tb-l.TiS)/tau)
	return t, l.PEEPCmH2O, -v / tau
}

// appendLine appends sample n in the sample line format v1 (default
// columns time[s],pressure[cmH2O],flow[L/min]).
func (l passiveLung) appendLine(dst []byte, n int) []byte {
	t, p, f := l.sample(n)
	dst = strconv.AppendFloat(dst, t, 'f', 3, 64)
	dst = append(dst, ',')
	dst = strconv.AppendFloat(dst, p, 'f', 3, 64)
	dst = append(dst, ',')
	dst = strconv.AppendFloat(dst, f*60, 'f', 3, 64)
	return append(dst, '\n')
}
