package analyze

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestRohrerFitOnlyWhereFlowDependenceShows counts the breaths fitted with
// Rohrer's equation. A linear lung with 1 L/min of flow noise at R 20 (the
// closed form, linearVC) is fitted on some breaths, at least every
// rohrerEvery-th, and not on all; a lung whose resistance grows with flow
// (K2 31.25 cmH2O·s²/L², the Runge–Kutta integration of rohrerVC, with the
// same noise) on every breath once the pool has seen it, and keeps its
// rohrer flag (TestRohrerPooledNoisyFlow checks its intrinsic PEEP).
func TestRohrerFitOnlyWhereFlowDependenceShows(t *testing.T) {
	lin := linearVC{R: 20, C: 0.05, PEEP: 5, VT: 0.5, Rate: 20, TFlow: 0.8, Pause: 0.2, Fs: 200, NoiseP: 0.3, NoiseF: 1.0 / 60, Steady: true, Seed: 61}
	a := NewAnalyzer("lin", DefaultConfig())
	n := 0
	for _, s := range lin.samples(120) {
		if _, ok := a.Push(s); ok {
			n++
		}
	}
	p := a.k2Pool
	t.Logf("linear lung: %d breaths, %d fitted, %d skipped", n, p.fits, p.skips)
	// Every fourth breath at least, and a third of them skipped at least
	// (a K2 one standard error above zero is a chance of about 1 in 6 on
	// a lung without flow dependence).
	if p.fits+p.skips < n*9/10 || p.skips < n/3 || 4*p.fits < p.fits+p.skips {
		t.Errorf("linear lung: %d fitted and %d skipped of %d breaths; want a third skipped and one in 4 fitted", p.fits, p.skips, n)
	}

	rng := rand.New(rand.NewPCG(62, 63))
	m := &rohrerVC{K1: 25, K2: 31.25, C: 0.08, PEEP: 5, VT: 0.6, Ti: 0.75, Rate: 15, Fs: 50, Square: true, Breaths: 60}
	m.generate()
	a = NewAnalyzer("rohrer", DefaultConfig())
	var skipsAt20, flagged, after int
	k := 0
	for _, s := range m.samples {
		s.FlowLPS += rng.NormFloat64() / 60
		s.PressureCmH2O += 0.1 * rng.NormFloat64()
		b, ok := a.Push(s)
		if !ok {
			continue
		}
		if k++; k == 20 {
			skipsAt20 = a.k2Pool.skips
		}
		if k > 20 {
			after++
			if b.HasFlag(FlagRohrer) {
				flagged++
			}
		}
	}
	t.Logf("Rohrer lung: %d skipped in the first 20 breaths, %d after; rohrer on %d of the %d after",
		skipsAt20, a.k2Pool.skips-skipsAt20, flagged, after)
	if a.k2Pool.skips != skipsAt20 || flagged < after*8/10 {
		t.Errorf("Rohrer lung: %d breaths skipped after the 20th, rohrer on %d of %d; want none skipped and 80 %% flagged",
			a.k2Pool.skips-skipsAt20, flagged, after)
	}
}

// TestRohrerPoolAgesOnSkippedBreaths: a skipped breath ages the pool as a
// fitted breath does before its weight enters (each sum times
// rohrerPoolKeep, the sum of squared weights times its square). K2/R and
// its standard error stay the same (to rounding); the next fitted breath
// then weighs more against the old ones, as it would after a fitted breath.
func TestRohrerPoolAgesOnSkippedBreaths(t *testing.T) {
	p := rohrerPool{w: 10, w2: 4, wk: 3}
	q0, _ := p.k2(1)
	se0 := math.Sqrt(p.w2) / p.w
	p.skip()
	if p.w != 10*rohrerPoolKeep || p.w2 != 4*rohrerPoolKeep*rohrerPoolKeep || p.wk != 3*rohrerPoolKeep {
		t.Fatalf("after a skip: %+v", p)
	}
	q1, _ := p.k2(1)
	if se1 := math.Sqrt(p.w2) / p.w; math.Abs(q1-q0) > 1e-12*q0 || math.Abs(se1-se0) > 1e-12*se0 {
		t.Errorf("K2/R %v → %v, its standard error %v → %v on a skipped breath", q0, q1, se0, se1)
	}
}
