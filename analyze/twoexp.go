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
	var by, bb [expGridN]float64
	var c [expGridN][expGridN]float64
	expGram(s[:n], y[:n], &by, &bb, &c)
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
			cjk := c[j][k]
			det := bb[j]*bb[k] - cjk*cjk
			if !(det > 1e-12*bb[j]*bb[k]) {
				continue
			}
			a1 := (by[j]*bb[k] - by[k]*cjk) / det
			a2 := (by[k]*bb[j] - by[j]*cjk) / det
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

// expGram fills the inner products of the exponential basis e^(−s/τⱼ) of
// the grid with the flow y (by), with itself (bb), and between pairs of
// time constants at least two grid steps apart (c). The decimated points
// are evenly spaced in time when the samples are; then every inner product
// of two exponentials is a geometric series with a closed form, and the
// basis is a running product, so the fit needs no exponential per point
// and no pass over the points per pair.
func expGram(s, y []float64, by, bb *[expGridN]float64, c *[expGridN][expGridN]float64) {
	n := len(s)
	h := (s[n-1] - s[0]) / float64(n-1)
	if !evenlySpaced(s, h) {
		expGramDirect(s, y, by, bb, c)
		return
	}
	// Σᵢ qⁱ over i < n is (1 − qⁿ)/(1 − q); with q = rⱼ·rₖ both factors
	// are written with expm1 so that q near 1 loses no precision:
	// 1 − rⱼrₖ = (1 − rⱼ) + rⱼ(1 − rₖ).
	var e0, r, om, rn, omn [expGridN]float64
	fn := float64(n)
	for j, tau := range expGrid {
		lam := 1 / tau
		e0[j] = math.Exp(-s[0] * lam)
		r[j] = math.Exp(-h * lam)
		om[j] = -math.Expm1(-h * lam)
		rn[j] = math.Exp(-fn * h * lam)
		omn[j] = -math.Expm1(-fn * h * lam)
		e, sum := e0[j], 0.0
		for i := range n {
			sum += e * y[i]
			e *= r[j]
		}
		by[j] = sum
	}
	series := func(j, k int) float64 {
		return e0[j] * e0[k] * (omn[j] + rn[j]*omn[k]) / (om[j] + r[j]*om[k])
	}
	for j := range expGridN {
		bb[j] = series(j, j)
		for k := j + 2; k < expGridN; k++ {
			c[j][k] = series(j, k)
		}
	}
}

// evenlySpaced reports whether the times s lie on a grid of step h within
// 1e-4 of the step (sampling at a fixed rate; decimation keeps it).
func evenlySpaced(s []float64, h float64) bool {
	if !(h > 0) {
		return false
	}
	tol := 1e-4 * h
	for i := range s {
		if math.Abs(s[i]-s[0]-float64(i)*h) > tol {
			return false
		}
	}
	return true
}

// expGramDirect computes the same inner products as expGram point by
// point, for unevenly spaced samples.
func expGramDirect(s, y []float64, by, bb *[expGridN]float64, c *[expGridN][expGridN]float64) {
	var basis [expGridN][bufCap]float64
	for j, tau := range expGrid {
		for i := range s {
			e := math.Exp(-s[i] / tau)
			basis[j][i] = e
			by[j] += e * y[i]
			bb[j] += e * e
		}
	}
	for j := range expGridN {
		for k := j + 2; k < expGridN; k++ {
			v := 0.0
			for i := range s {
				v += basis[j][i] * basis[k][i]
			}
			c[j][k] = v
		}
	}
}
