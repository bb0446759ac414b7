package analyze

import "math"

// Refinement of the two-exponential fit off the grid of time constants.
//
// A grid step of 22 % in the fast time constant is enough to move the slow
// one far: on a lung with unit time constants ten times apart the large
// fast amplitude, fitted with a time constant 2 % off, leaves a residual
// that a shorter slow component absorbs (0.38 and 1.9 s found on the grid
// for 0.39 and 2.6 s, two thirds of the remaining volume). The fit is
// therefore refined by variable projection (Golub GH, Pereyra V, "The
// differentiation of pseudo-inverses and nonlinear least squares problems
// whose variables separate", SIAM J Numer Anal 1973;10:413): for a pair of
// time constants the two amplitudes are a linear least-squares solve, so
// the residual is a function of the pair alone, minimised here by
// alternating golden-section searches on the logarithm of each time
// constant.
//
// With flow noise the slow time constant is poorly determined on a single
// expiration (the residual is flat along a valley where a longer slow time
// constant trades against a smaller amplitude), and the volume still to
// exhale at its best point may lie above the truth as often as below. The
// figure kept is therefore a lower confidence bound from the profile of the
// residual (Venzon DJ, Moolgavkar SH, "A method for computing
// profile-likelihood-based confidence intervals", Appl Stat 1988;37:87):
// the shortest slow time constant whose profile residual stays within
// χ²₁(0.95) = 3.84 noise variances of the minimum, with its own amplitudes.
const (
	// goldenIters is the number of golden-section steps of one search
	// (our choice: the bracket shrinks by 0.618 each, to 0.01 % of its
	// logarithmic width).
	goldenIters = 20
	// slowTauMaxS bounds the slow time constant the refinement may reach.
	slowTauMaxS = 30.0
	// chi2One95 is the 95 % quantile of χ² with one degree of freedom
	// (any table of the χ² distribution).
	chi2One95 = 3.841
)

// expPts are the points of one expiration for the refinement.
type expPts struct {
	s, y []float64
	h    float64 // step when evenly spaced, else 0
}

// pairSS returns the residual sum of squares of the best non-negative
// amplitudes for the time constants t1 < t2, and the amplitudes; +Inf when
// either amplitude would be negative or the pair is degenerate (two
// compartments cannot exhale a negative flow).
func (p *expPts) pairSS(t1, t2 float64) (ss, a1, a2 float64) {
	var b11, b12, b22, y1, y2, yy float64
	s, y := p.s, p.y
	if p.h > 0 {
		e1, e2 := math.Exp(-s[0]/t1), math.Exp(-s[0]/t2)
		r1, r2 := math.Exp(-p.h/t1), math.Exp(-p.h/t2)
		for i := range s {
			b11 += e1 * e1
			b12 += e1 * e2
			b22 += e2 * e2
			y1 += e1 * y[i]
			y2 += e2 * y[i]
			yy += y[i] * y[i]
			e1 *= r1
			e2 *= r2
		}
	} else {
		for i := range s {
			e1, e2 := math.Exp(-s[i]/t1), math.Exp(-s[i]/t2)
			b11 += e1 * e1
			b12 += e1 * e2
			b22 += e2 * e2
			y1 += e1 * y[i]
			y2 += e2 * y[i]
			yy += y[i] * y[i]
		}
	}
	det := b11*b22 - b12*b12
	if !(det > 1e-12*b11*b22) {
		return math.Inf(1), 0, 0
	}
	a1 = (y1*b22 - y2*b12) / det
	a2 = (y2*b11 - y1*b12) / det
	if !(a1 > 0 && a2 > 0) {
		return math.Inf(1), 0, 0
	}
	return math.Max(0, yy-a1*y1-a2*y2), a1, a2
}

// golden minimises f on [lo, hi] (logarithms of a time constant) by
// golden-section search (Kiefer J, Proc Am Math Soc 1953;4:502) and
// returns the abscissa and value of the best point seen.
func golden(f func(float64) float64, lo, hi float64) (x, fx float64) {
	const g = 0.6180339887498949 // (√5 − 1)/2
	c, d := hi-g*(hi-lo), lo+g*(hi-lo)
	fc, fd := f(c), f(d)
	for range goldenIters {
		if fc <= fd {
			hi, d, fd = d, c, fc
			c = hi - g*(hi-lo)
			fc = f(c)
		} else {
			lo, c, fc = c, d, fd
			d = lo + g*(hi-lo)
			fd = f(d)
		}
	}
	if fc <= fd {
		return c, fc
	}
	return d, fd
}

// refine moves the grid's pair of time constants of f to the minimum of the
// variable-projection residual: a golden-section search on the logarithm
// of the slow time constant of the profile residual, the fast one
// re-optimised (again by golden section) for each slow one, keeping the
// slow one at least twice the fast one and at most slowTauMaxS. It then
// lowers the slow component to the lower confidence bound of the volume
// still to exhale at sEnd. It leaves f unchanged when no pair with positive
// amplitudes improves it.
func (p *expPts) refine(f *expFit, sEnd float64) {
	if !f.two {
		return
	}
	l1 := math.Log(f.tau1)
	best, _, _ := p.pairSS(f.tau1, f.tau2)
	x, v := golden(func(x float64) float64 {
		ss, _ := p.profile(l1, x)
		return ss
	}, l1+math.Ln2, math.Log(slowTauMaxS))
	n := len(p.s)
	if !(v < best) || n <= 4 {
		return
	}
	_, l1b := p.profile(l1, x)
	_, a1, a2 := p.pairSS(math.Exp(l1b), math.Exp(x))
	f.tau1, f.tau2, f.a1, f.a2 = math.Exp(l1b), math.Exp(x), a1, a2
	p.lowerSlow(f, v+chi2One95*v/float64(n-4), sEnd)
}

// profile returns the smallest residual over fast time constants within
// 0.3 in log of exp(l1) (and below half the slow one) for the slow time
// constant exp(l2), and the logarithm of that fast time constant.
func (p *expPts) profile(l1, l2 float64) (ss, l1b float64) {
	const w1 = 0.3 // half-width of the fast search in log (our choice)
	l1b, ss = golden(func(x float64) float64 {
		v, _, _ := p.pairSS(math.Exp(x), math.Exp(l2))
		return v
	}, l1-w1, math.Min(l1+w1, l2-math.Ln2))
	return ss, l1b
}

// lowerSlow replaces the slow component of f by the one of shortest time
// constant whose profile residual (fast time constant re-optimised) stays
// under limit, found by bisection on the logarithm of the slow time
// constant between twice the fast one and the best fit, when that leaves
// less volume to exhale at sEnd.
func (p *expPts) lowerSlow(f *expFit, limit, sEnd float64) {
	l1 := math.Log(f.tau1)
	profile := func(l2 float64) (float64, float64) { return p.profile(l1, l2) }
	in, out := math.Log(f.tau2), math.Log(f.tau1)+math.Ln2
	if ss, _ := profile(out); ss <= limit {
		in = out
	} else {
		for range goldenIters {
			mid := (in + out) / 2
			if ss, _ := profile(mid); ss <= limit {
				in = mid
			} else {
				out = mid
			}
		}
	}
	_, l1b := profile(in)
	ss, a1, a2 := p.pairSS(math.Exp(l1b), math.Exp(in))
	if math.IsInf(ss, 1) {
		return
	}
	g := expFit{a1: a1, a2: a2, tau1: math.Exp(l1b), tau2: math.Exp(in), two: true, ok: true}
	if g.remaining(sEnd) < f.remaining(sEnd) {
		*f = g
	}
}
