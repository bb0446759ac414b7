package analyze

import "math"

// Grid of the two-exponential fit of expiratory flow (our choice: 28
// time constants spaced evenly in log from 0.05 to 12 s, a step of about
// 22 %, finer than the precision the trapped volume needs).
const (
	expGridN    = 28
	expGridMinS = 0.05
	expGridMaxS = 12.0
	// twoExpMinGain is the share of the single exponential's residual sum
	// of squares the second exponential must remove to be kept (our
	// choice).
	twoExpMinGain = 0.3
)

var expGrid = func() (g [expGridN]float64) {
	r := math.Pow(expGridMaxS/expGridMinS, 1/float64(expGridN-1))
	for i := range g {
		g[i] = expGridMinS * math.Pow(r, float64(i))
	}
	return g
}()

// expFit is a fit of passive expiratory flow as a sum of exponentials,
// |V'|(s) = a1·e^(−s/τ1) + a2·e^(−s/τ2), s from the start of expiration.
type expFit struct {
	a1, a2, tau1, tau2 float64
	two                bool
	ok                 bool
}

// remaining is the volume the fitted emptying still had to exhale at s:
// Σ aᵢ·τᵢ·e^(−s/τᵢ), the integral of the flow from s on.
func (f *expFit) remaining(s float64) float64 {
	v := f.a1 * f.tau1 * math.Exp(-s/f.tau1)
	if f.two {
		v += f.a2 * f.tau2 * math.Exp(-s/f.tau2)
	}
	return v
}

// fitTwoExp fits the expiratory flow of the decimated breath between the
// point where 10 % of vte has been exhaled (after the valve transient) and
// endT, by variable projection: for every pair of grid time constants the
// amplitudes are a linear least-squares problem, and the pair with the
// smallest residual wins. Passive emptying of two parallel compartments is
// a sum of two exponentials (Otis AB et al., J Appl Physiol 1956;8:427);
// the volume still to exhale at the end of expiration is then the sum of
// each component's amplitude × time constant × its remaining fraction. The
// second exponential is kept only when it removes twoExpMinGain of the
// single exponential's residual and both amplitudes are positive.
func (a *Analyzer) fitTwoExp(vte, endT float64) expFit {
	var s, y [bufCap]float64
	n := 0
	for i := 0; i < a.buf.n; i++ {
		q := &a.buf.pts[i]
		if q.t < a.expStartT {
			continue
		}
		if q.t >= endT {
			break
		}
		if a.expStartV-q.v >= 0.1*vte {
			s[n], y[n] = q.t-a.expStartT, -q.f
			n++
		}
	}
	if n < 8 {
		return expFit{}
	}
	var basis [expGridN][bufCap]float64
	var by, bb [expGridN]float64
	for j, tau := range expGrid {
		for i := range n {
			e := math.Exp(-s[i] / tau)
			basis[j][i] = e
			by[j] += e * y[i]
			bb[j] += e * e
		}
	}
	yy := 0.0
	for i := range n {
		yy += y[i] * y[i]
	}
	best := expFit{}
	bestSS := math.Inf(1)
	for j := range expGridN {
		if a1 := by[j] / bb[j]; a1 > 0 {
			if ss := yy - a1*by[j]; ss < bestSS {
				bestSS, best = ss, expFit{a1: a1, tau1: expGrid[j], ok: true}
			}
		}
	}
	oneSS := bestSS
	for j := range expGridN {
		for k := j + 2; k < expGridN; k++ {
			c := 0.0
			for i := range n {
				c += basis[j][i] * basis[k][i]
			}
			det := bb[j]*bb[k] - c*c
			if !(det > 1e-12*bb[j]*bb[k]) {
				continue
			}
			a1 := (by[j]*bb[k] - by[k]*c) / det
			a2 := (by[k]*bb[j] - by[j]*c) / det
			if !(a1 > 0 && a2 > 0) {
				continue
			}
			ss := yy - a1*by[j] - a2*by[k]
			if ss < bestSS && ss < (1-twoExpMinGain)*oneSS {
				bestSS = ss
				best = expFit{a1: a1, a2: a2, tau1: expGrid[j], tau2: expGrid[k], two: true, ok: true}
			}
		}
	}
	return best
}

// fitTwoExpIf runs fitTwoExp when cond holds.
func (a *Analyzer) fitTwoExpIf(cond bool, vte, endT float64) expFit {
	if !cond {
		return expFit{}
	}
	return a.fitTwoExp(vte, endT)
}
