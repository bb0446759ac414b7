package analyze

import (
	"math"
	"slices"
)

// Summary holds the medians of a recording's breaths. Mechanics (R, C, τ,
// P0) are medians over reliable breaths only (see Breath.Reliable); the
// other values over every breath where they are known.
type Summary struct {
	Breaths, Reliable int

	RateBPM, VtiML, VteML, PeakCmH2O, PlateauCmH2O, PEEPCmH2O float64
	EndExpFlowLPM, TeOverTau, TrappedML, PEEPiCmH2O           float64
	RCmH2OSPerL, CMLPerCmH2O, TauS, PTot0CmH2O                float64
}

// Summarize returns the medians of bs. The median keeps single breaths with
// effort, coughs or artefacts from moving the figure, which a mean would not.
func Summarize(bs []Breath) Summary {
	s := Summary{Breaths: len(bs)}
	all := func(get func(*Breath) float64) float64 { return medianOf(bs, get, false) }
	rel := func(get func(*Breath) float64) float64 { return medianOf(bs, get, true) }
	for i := range bs {
		if bs[i].Reliable() {
			s.Reliable++
		}
	}
	s.RateBPM = all(func(b *Breath) float64 { return b.RateBPM })
	s.VtiML = all(func(b *Breath) float64 { return b.VtiML })
	s.VteML = all(func(b *Breath) float64 { return b.VteML })
	s.PeakCmH2O = all(func(b *Breath) float64 { return b.PeakCmH2O })
	s.PlateauCmH2O = all(func(b *Breath) float64 { return b.PlateauCmH2O })
	s.PEEPCmH2O = all(func(b *Breath) float64 { return b.PEEPCmH2O })
	s.EndExpFlowLPM = all(func(b *Breath) float64 { return b.EndExpFlowLPM })
	s.TeOverTau = all(func(b *Breath) float64 { return b.TeOverTau })
	s.TrappedML = all(func(b *Breath) float64 { return b.TrappedML })
	s.PEEPiCmH2O = all(func(b *Breath) float64 { return b.PEEPiCmH2O })
	s.RCmH2OSPerL = rel(func(b *Breath) float64 { return b.RCmH2OSPerL })
	s.CMLPerCmH2O = rel(func(b *Breath) float64 { return b.CMLPerCmH2O })
	s.TauS = rel(func(b *Breath) float64 { return b.TauS })
	s.PTot0CmH2O = rel(func(b *Breath) float64 { return b.PTot0CmH2O })
	return s
}

// MedianOf returns the median of the known values of get over bs, or NaN
// when there are none.
func MedianOf(bs []Breath, get func(*Breath) float64) float64 { return medianOf(bs, get, false) }

// medianOf returns the median of the known values of get over bs (only
// reliable breaths when reliableOnly), or NaN when there are none.
func medianOf(bs []Breath, get func(*Breath) float64, reliableOnly bool) float64 {
	vs := make([]float64, 0, len(bs))
	for i := range bs {
		if reliableOnly && !bs[i].Reliable() {
			continue
		}
		if v := get(&bs[i]); !math.IsNaN(v) && !math.IsInf(v, 0) {
			vs = append(vs, v)
		}
	}
	if len(vs) == 0 {
		return math.NaN()
	}
	slices.Sort(vs)
	if n := len(vs); n%2 == 1 {
		return vs[n/2]
	} else {
		return (vs[n/2-1] + vs[n/2]) / 2
	}
}
