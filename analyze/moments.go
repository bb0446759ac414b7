package analyze

import "math"

// segment accumulates what a stretch of samples contributes to a breath:
// the normal equations of the equation of motion P = R·V' + E·V + P0 (Bates
// 2009, linear single-compartment model) as plain sums, and the extremes of
// pressure and flow. Sums are additive, so the stretch after a tentative
// start of inspiration can be kept apart and merged back when the start
// turns out to be noise.
type segment struct {
	n                                float64
	f, v, p, ff, fv, vv, fp, vp, pp  float64
	maxP, maxPFlow, minP, maxF, minF float64
	hasExtremes                      bool
}

func (s *segment) reset() { *s = segment{} }

// add accumulates one sample: flow f (L/s), volume v since the start of the
// breath (L) and pressure p (cmH2O).
func (s *segment) add(f, v, p float64) {
	s.n++
	s.f += f
	s.v += v
	s.p += p
	s.ff += f * f
	s.fv += f * v
	s.vv += v * v
	s.fp += f * p
	s.vp += v * p
	s.pp += p * p
	if !s.hasExtremes {
		s.maxP, s.maxPFlow, s.minP, s.maxF, s.minF = p, f, p, f, f
		s.hasExtremes = true
		return
	}
	if p > s.maxP {
		s.maxP, s.maxPFlow = p, f
	}
	if p < s.minP {
		s.minP = p
	}
	if f > s.maxF {
		s.maxF = f
	}
	if f < s.minF {
		s.minF = f
	}
}

// merge adds o, whose volumes were counted from a point dv litres into this
// segment's breath, so that o's volumes become dv + v. The shift is exact on
// the sums: Σ(v+a) = Σv + n·a, Σ(v+a)² = Σv² + 2aΣv + n·a², Σ(v+a)x = Σvx + aΣx.
func (s *segment) merge(o *segment, dv float64) {
	if o.n == 0 {
		return
	}
	s.n += o.n
	s.f += o.f
	s.v += o.v + o.n*dv
	s.p += o.p
	s.ff += o.ff
	s.fv += o.fv + dv*o.f
	s.vv += o.vv + 2*dv*o.v + o.n*dv*dv
	s.fp += o.fp
	s.vp += o.vp + dv*o.p
	s.pp += o.pp
	if !s.hasExtremes {
		s.maxP, s.maxPFlow, s.minP, s.maxF, s.minF = o.maxP, o.maxPFlow, o.minP, o.maxF, o.minF
		s.hasExtremes = true
		return
	}
	if o.maxP > s.maxP {
		s.maxP, s.maxPFlow = o.maxP, o.maxPFlow
	}
	s.minP = math.Min(s.minP, o.minP)
	s.maxF = math.Max(s.maxF, o.maxF)
	s.minF = math.Min(s.minF, o.minF)
}

// fitResult is the least-squares solution of the equation of motion.
type fitResult struct {
	r, e, p0, r2 float64
	singular     bool
}

// minDecorrelation is the smallest 1 − ρ² between flow and volume for which
// the normal equations are solved. Below it flow and volume carry the same
// information (for example a square-flow inspiration alone, where flow is
// constant and collinear with the intercept) and R and E cannot be separated.
const minDecorrelation = 1e-4

// fit solves the normal equations of P = R·V' + E·V + P0 in centred form
// (ordinary least squares; the intercept is eliminated by centring, which
// keeps the 2×2 system well scaled).
func (s *segment) fit() fitResult {
	if s.n < 5 {
		return fitResult{singular: true}
	}
	mf, mv, mp := s.f/s.n, s.v/s.n, s.p/s.n
	sff := s.ff - s.n*mf*mf
	svv := s.vv - s.n*mv*mv
	sfv := s.fv - s.n*mf*mv
	sfp := s.fp - s.n*mf*mp
	svp := s.vp - s.n*mv*mp
	spp := s.pp - s.n*mp*mp
	if !(sff > 1e-12*s.n) || !(svv > 1e-14*s.n) || !(spp > 0) {
		return fitResult{singular: true}
	}
	det := sff*svv - sfv*sfv
	if !(det > minDecorrelation*sff*svv) {
		return fitResult{singular: true}
	}
	r := (sfp*svv - svp*sfv) / det
	e := (svp*sff - sfp*sfv) / det
	p0 := mp - r*mf - e*mv
	ssr := spp - r*sfp - e*svp
	r2 := 1 - ssr/spp
	if math.IsNaN(r) || math.IsNaN(e) || math.IsInf(r, 0) || math.IsInf(e, 0) {
		return fitResult{singular: true}
	}
	return fitResult{r: r, e: e, p0: p0, r2: math.Min(1, r2)}
}
