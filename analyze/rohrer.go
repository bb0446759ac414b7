package analyze

import "math"

// rohrerFit is the equation of motion with a flow-dependent resistance,
// P = K1·V' + K2·V'·|V'| + E·V + P0 (Rohrer F, 1915), fitted by least
// squares with the moments corrected for flow noise (see fitRohrer).
type rohrerFit struct {
	k1, k2, e, p0 float64
	sse, sseLin   float64 // residual sums of squares of this fit and of the linear one
	sst           float64 // sum of squares of pressure about its mean
	n             int
	ok            bool
	// k2Var is the variance of K2 (see k2Var); +Inf when unknown.
	k2Var float64
	// s holds the normal equations the fit solved (noise-corrected), for
	// a refit with K2 given (withK2); maxF is the breath's largest |V'|.
	s    [5][5]float64
	maxF float64
	// pooled is true when K2 came from the recent breaths (withK2).
	pooled bool
}

// Significance of the flow dependence (our choice): the Rohrer term must
// remove at least rohrerMinGain (at a high resistance most of the residual
// is flow noise times R, so the share is small even when the term is real) of the linear fit's residual sum of
// squares and pass an F test of one added parameter at rohrerMinF
// (roughly p < 0.001 for the point counts of a breath), or with the flow
// noise corrected for, a Wald test of K2 at the same value (see fitRohrer).
const (
	rohrerMinGain = 0.05
	rohrerMinF    = 12
)

// fitRohrer fits the Rohrer equation of motion to the decimated points of
// the breath before endT, with the moments of the flow columns corrected
// for the flow sensor's noise (noiseSums.correct). It returns ok only when
// the flow-dependent term is significant, positive, and leaves a positive
// K1 and elastance.
func fitRohrer(pts []point, endT float64) rohrerFit {
	// Points beside a step of flow (the valves switching) carry the
	// sampling's timing error times the resistance; they are left out so
	// that the fit sees the flow dependence, not the steps.
	maxF := 0.0
	for i := range pts {
		if af := math.Abs(pts[i].f); af > maxF {
			maxF = af
		}
	}
	lim := 0.15 * maxF
	// The points are gathered once for the three passes (sums, noise,
	// variance); an array on the stack, not a buffer kept per stream.
	var buf [bufCap]fitPoint
	fp := collectFitPoints(pts, endT, lim, buf[:0])
	s, sg, n := rohrerSums(fp)
	if n < 12 {
		return rohrerFit{}
	}
	obs := s
	v := sg.noiseVar(fp)
	if v > 0 {
		sg.correct(&s, n, v)
	}
	full, okFull := solveNormal(s, []int{0, 1, 2, 3})
	lin, okLin := solveNormal(s, []int{0, 2, 3})
	if !okFull || !okLin {
		return rohrerFit{}
	}
	sse := residualSS(obs, []int{0, 1, 2, 3}, &full)
	sseLin := residualSS(obs, []int{0, 2, 3}, &lin)
	f := rohrerFit{k1: full[0], k2: full[1], e: full[2], p0: full[3], sse: sse, sseLin: sseLin, n: n,
		sst: math.Max(0, obs[4][4]-obs[3][4]*obs[3][4]/obs[3][3])}
	gain := sseLin - sse
	// Significance of K2: the F statistic of the added column for ordinary
	// least squares; with the noise correction, the Wald statistic with
	// the sandwich variance of the corrected estimator (k2Var), which
	// counts what the correction adds to the scatter.
	f.k2Var, f.s, f.maxF = k2Var(fp, &s, &full, v), s, maxF
	stat := gain / (sse / float64(n-4))
	if v > 0 {
		stat = f.k2 * f.k2 / f.k2Var
	}
	f.ok = f.k2 > 0 && f.k1 > 0 && f.e > 0 && sse > 0 &&
		gain > rohrerMinGain*sseLin && stat > rohrerMinF
	return f
}

// fitPoint is a point of the Rohrer fit: flow, volume and pressure, and
// the second difference of flow at it (NaN when it has no neighbour on
// either side before the end of the fit).
type fitPoint struct{ f, v, p, d2f float64 }

// collectFitPoints appends to dst each point of pts before endT that is
// not beside a step of flow larger than lim (a point next to the valves
// switching carries the sampling's timing error times the resistance):
// the points of the Rohrer fit, in order.
func collectFitPoints(pts []point, endT, lim float64, dst []fitPoint) []fitPoint {
	nextStep := false // whether the flow steps from point i to point i+1
	for i := range pts {
		q := &pts[i]
		if q.t >= endT {
			break
		}
		prevStep := nextStep
		nextStep = i+1 < len(pts) && math.Abs(pts[i+1].f-q.f) > lim
		if prevStep || nextStep {
			continue
		}
		d := math.NaN()
		if dd, ok := secondDiff(pts, i, endT); ok {
			d = dd
		}
		dst = append(dst, fitPoint{q.f, q.v, q.p, d})
	}
	return dst
}

// noiseSums are the sums the flow-noise correction needs besides the
// normal equations: Σ|V'|, Σsign(V'), Σsign(V')·V and Σsign(V')·P, and the
// sum and count of the squared second differences of flow (see noiseVar).
type noiseSums struct {
	abs, sign, signV, signP float64
	d2                      float64
	nd2                     int
}

// rohrerSums returns the normal equations of [V', V'|V'|, V, 1] against P
// (P in column 4) over the fit points, the sums of noiseSums over the same
// points, and their count.
func rohrerSums(fp []fitPoint) (s [5][5]float64, sg noiseSums, n int) {
	// The sums are kept in locals (registers) rather than in the matrix: a
	// Go array lives in memory, and a load and store per term and point
	// cost more than the arithmetic.
	var s00, s01, s02, s03, s04, s11, s12, s13, s14, s22, s23, s24, s34, s44 float64
	var sa, sn, snv, snp, sd2 float64
	nd2 := 0
	for i := range fp {
		q := &fp[i]
		f, v, p := q.f, q.v, q.p
		if d := q.d2f; d == d {
			sd2 += d * d
			nd2++
		}
		fa := f * math.Abs(f)
		s00 += f * f
		s01 += f * fa
		s02 += f * v
		s03 += f
		s04 += f * p
		s11 += fa * fa
		s12 += fa * v
		s13 += fa
		s14 += fa * p
		s22 += v * v
		s23 += v
		s24 += v * p
		s34 += p
		s44 += p * p
		g := math.Copysign(1, f)
		sa += g * f
		sn += g
		snv += g * v
		snp += g * p
		n++
	}
	s33 := float64(n) // the count, exact as a float64
	s = [5][5]float64{
		{s00, s01, s02, s03, s04},
		{s01, s11, s12, s13, s14},
		{s02, s12, s22, s23, s24},
		{s03, s13, s23, s33, s34},
		{s04, s14, s24, s34, s44},
	}
	return s, noiseSums{sa, sn, snv, snp, sd2, nd2}, n
}

// correct takes the expected content of white flow noise of variance v out
// of the normal equations s of n points.
//
// Flow noise in the regressors biases ordinary least squares (errors in
// variables): in a passive expiration flow and volume are tied, the fit
// shrinks the resistance there, and V'|V'| took that for a flow
// dependence, on linear lungs too (12–55 % of the breaths at
// R 50 with 1 L/min of white flow noise, TestFitRohrerFlowNoise). The
// moments of the flow columns are corrected by their expected noise
// content (adjusted least squares for polynomial regression with errors in
// the variables: Cheng C-L, Schneeweiss H, J R Stat Soc B 1998;60:189),
// with V'|V'| taken as sign·V'² and the sign as observed, which holds once
// |V'| is a few noise deviations: E[x²] = f² + v, E[x³] = f³ + 3fv,
// E[x⁴] = f⁴ + 6f²v + 3v² for x = f + noise. The residual sums of squares
// stay those of the observed data.
func (sg *noiseSums) correct(s *[5][5]float64, n int, v float64) {
	nf := float64(n)
	s[1][1] -= 6*v*s[0][0] - 3*nf*v*v // before s[0][0] is corrected
	s[0][0] -= nf * v
	s[0][1] -= 3 * v * sg.abs
	s[1][2] -= v * sg.signV
	s[1][3] -= v * sg.sign
	s[1][4] -= v * sg.signP
	s[1][0], s[2][1], s[3][1], s[4][1] = s[0][1], s[1][2], s[1][3], s[1][4]
}

// withK2 refits the breath of f with K2 given: K1·V' + E·V + P0 against
// P − K2·V'|V'|, from the same (noise-corrected) normal equations. It
// reports false when the fit fails or is not physical (K1 or E not
// positive), when the breath's own K2 rejects the given one (a Wald
// statistic of the difference at rohrerMinF), or when the flow-dependent
// term is too small to matter (rohrerPoolMinShare).
func (f *rohrerFit) withK2(k2 float64) (rohrerFit, bool) {
	if !(f.k2Var > 0) || math.IsInf(f.k2Var, 0) {
		return rohrerFit{}, false
	}
	s := &f.s
	t := *s
	for _, r := range []int{0, 2, 3} {
		t[r][4] = s[r][4] - k2*s[r][1]
	}
	x, ok := solveNormal(t, []int{0, 2, 3})
	if !ok {
		return rohrerFit{}, false
	}
	g := *f
	g.k1, g.k2, g.e, g.p0 = x[0], k2, x[1], x[2]
	g.pooled = true
	d := f.k2 - k2
	g.ok = g.k1 > 0 && g.e > 0 && d*d/f.k2Var < rohrerMinF &&
		k2*f.maxF >= rohrerPoolMinShare*(g.k1+k2*f.maxF)
	return g, g.ok
}

// rohrerPool pools the flow dependence of recent breaths as K2 over the
// breath's linear resistance, K2/R, each breath weighted by the inverse of
// its variance (that of K2 over R², R being far better determined than
// K2) and older breaths by rohrerPoolKeep per breath (the fixed-effect,
// inverse-variance pooled estimate; Hedges LV, Olkin I, Statistical
// Methods for Meta-Analysis, 1985). With 1 L/min of flow noise at R 50 one
// breath seldom determines K2 on its own, a few breaths together do; the
// noise-corrected K2 of each breath is unbiased, so that pooling does not
// add up a bias.
//
// Relative to R rather than K2 itself: when the airways narrow or open,
// both of Rohrer's terms change (a resistance doubled doubles both on the
// acceptance grid), and a K2 pooled from before the change held the
// breaths after it at the old K2, with K1 making up the difference at the
// inspiratory flow, so that the resistance at the end-expiratory flow,
// and the intrinsic PEEP, read high (TestRohrerPoolFollowsResistance).
// K2/R follows a change that scales both terms at once.
type rohrerPool struct {
	w, w2, wk float64 // Σaᵢ, Σaᵢ²/wᵢ and Σaᵢqᵢ with aᵢ = keepⁱ·wᵢ, qᵢ = K2ᵢ/Rᵢ
	since     int     // breaths skipped since the last fit
	hint      bool    // the last fitted breath's K2 was rohrerHintZ standard errors above 0
	// fits and skips count the breaths fitted and skipped since the pool
	// was last cleared.
	fits, skips int
}

// When a breath's linear fit holds, Rohrer's equation is fitted to it only
// while there is a sign of flow dependence: the pool's K2/R, or the last
// fitted breath's K2, at least rohrerHintZ standard errors above zero;
// otherwise every rohrerEvery-th breath, which keeps the pool fed (our
// choice). The fit is a fifth of the analyzer's work at 200 Hz and more at
// lower rates (five passes over the decimated breath, the same ~150 points
// whatever the rate); a linear lung, whose K2 is noise around zero, is
// fitted on about one breath in three or four. A lung with a flow-dependent
// resistance is fitted on every breath once the pool sees it. On the
// acceptance and specificity grids every alarm figure stayed the same, and
// on the shipped scenarios (all linear lungs) half of the chance
// single-breath rohrer flags went (docs/analysis.md).
const (
	rohrerHintZ = 1.0
	rohrerEvery = 4
)

// wanted reports whether the next breath whose linear fit holds is fitted
// with Rohrer's equation. The pool's K2/R over its standard error is
// (Σaᵢqᵢ/Σaᵢ)/(√(Σaᵢ²/wᵢ)/Σaᵢ) = Σaᵢqᵢ/√(Σaᵢ²/wᵢ).
func (p *rohrerPool) wanted() bool {
	if p.hint || p.since >= rohrerEvery-1 || !(p.w2 > 0) {
		return true
	}
	return p.wk/math.Sqrt(p.w2) >= rohrerHintZ
}

// skip ages the pool by a breath that was not fitted, as add does before
// it enters a fitted breath's weight, so that the pool still spans about
// ten breaths.
func (p *rohrerPool) skip() {
	p.since++
	p.skips++
	p.age()
}

// age forgets a breath's worth of the pool's weights (rohrerPoolKeep).
func (p *rohrerPool) age() {
	p.w *= rohrerPoolKeep
	p.w2 *= rohrerPoolKeep * rohrerPoolKeep
	p.wk *= rohrerPoolKeep
}

// Pooling constants (ours): the pool forgets a breath's weight by
// rohrerPoolKeep per breath (about ten breaths' worth); its K2/R is used
// from rohrerPoolMinZ standard errors above zero, and when the
// flow-dependent term makes at least rohrerPoolMinShare of the resistance
// at the breath's largest flow.
const (
	rohrerPoolKeep     = 0.9
	rohrerPoolMinZ     = 3.3
	rohrerPoolMinShare = 0.1
)

// add enters the K2 of one breath whose linear resistance is r.
func (p *rohrerPool) add(f *rohrerFit, r float64) {
	p.since = 0
	p.fits++
	p.hint = f.k2Var > 0 && f.k2 > 0 && f.k2*f.k2 > rohrerHintZ*rohrerHintZ*f.k2Var
	if !(f.k2Var > 0) || math.IsInf(f.k2Var, 0) || math.IsNaN(f.k2) || !(r > 0) || math.IsInf(r, 0) {
		return
	}
	w := r * r / f.k2Var
	p.age()
	p.w += w
	p.w2 += w
	p.wk += w * f.k2 / r
}

// k2 returns the pooled K2 for a breath whose linear resistance is r, and
// whether it is significantly positive; the standard error of the pooled
// K2/R is √(Σaᵢ²/wᵢ)/Σaᵢ.
func (p *rohrerPool) k2(r float64) (float64, bool) {
	if !(p.w > 0) || !(p.w2 > 0) || !(r > 0) {
		return 0, false
	}
	q := p.wk / p.w
	return q * r, q*p.w/math.Sqrt(p.w2) >= rohrerPoolMinZ
}

// k2Var is the sandwich variance of K2 from the noise-corrected normal
// equations a (columns V', V'|V'|, V, 1; pressure in column 4) at their
// solution beta, σ² the variance of the flow noise: A⁻¹BA⁻¹ with A the
// corrected matrix and B the sum over the points of ψψᵀ, ψ the point's
// term of the corrected estimating equation, x(p − xᵀβ) − d + Dβ, where D
// and d are the point's expected noise content of xxᵀ and xp (the
// corrected-score variance; Carroll RJ et al., Measurement Error in
// Nonlinear Models, 2006, appendix on estimating equations). The points
// are those the fit used. +Inf when it cannot be formed.
func k2Var(fp []fitPoint, a *[5][5]float64, beta *[4]float64, v float64) float64 {
	// Row K2 of A⁻¹ (A is symmetric): solve A·w = e₁.
	t := *a
	for r := range 4 {
		t[r][4] = 0
	}
	t[1][4] = 1
	w, ok := solveNormal(t, []int{0, 1, 2, 3})
	if !ok {
		return math.Inf(1)
	}
	b0, b1, b2, b3 := beta[0], beta[1], beta[2], beta[3]
	w0, w1, w2, w3 := w[0], w[1], w[2], w[3]
	// wᵀψ with ψ = x·r − d + D·β (D and d as in noiseSums.correct), written
	// out: r·wᵀx + c0 + c2·V'² + sign(V')·(c1·V' − c3·P + c4·V + c5).
	c0 := v * (w0*b0 - 3*v*w1*b1)
	c1 := 3 * v * (w0*b1 + w1*b0)
	c2 := 6 * v * w1 * b1
	c3 := v * w1
	c4 := v * (w1*b2 + w2*b1)
	c5 := v * (w1*b3 + w3*b1)
	var acc float64 // Σ (wᵀψ)², which is wᵀBw
	for i := range fp {
		q := &fp[i]
		f, vol, p := q.f, q.v, q.p
		fa := f * math.Abs(f)
		r := p - (b0*f + b1*fa + b2*vol + b3)
		u := r*(w0*f+w1*fa+w2*vol+w3) + c0 + c2*f*f + math.Copysign(1, f)*(c1*f-c3*p+c4*vol+c5)
		acc += u * u
	}
	if !(acc > 0) {
		return math.Inf(1)
	}
	return acc
}

// secondDiff returns the second difference of flow at point i of pts,
// false when i has no neighbour on either side before endT.
func secondDiff(pts []point, i int, endT float64) (float64, bool) {
	if i == 0 || i+1 >= len(pts) || pts[i+1].t >= endT {
		return 0, false
	}
	return pts[i+1].f - 2*pts[i].f + pts[i-1].f, true
}

// noiseVar estimates the variance of the white noise of the flow of the
// points of the fit (collectFitPoints) from their second differences, whose
// squares rohrerSums summed into sg: a second difference of white noise
// has six times its variance. The mean is taken again without the squares
// above nine times the first mean, so that the curvature of a fast
// expiration and a few outliers count little; for normal noise the
// squares kept (χ² with one degree of freedom up to 9) average 0.9733 of
// the variance: E[X; X ≤ 9]/P(X ≤ 9) = P(χ²₃ ≤ 9)/P(χ²₁ ≤ 9) =
// 0.9707/0.9973, since x·f₁(x) = f₃(x) for the χ² densities (derived).
// Two passes over the points cost less than a median. 0 when too few
// points.
func (sg *noiseSums) noiseVar(fp []fitPoint) float64 {
	if sg.nd2 < 8 {
		return 0
	}
	cut := 9 * sg.d2 / float64(sg.nd2)
	sum, k := 0.0, 0
	for i := range fp {
		// A NaN (no second difference) fails the test.
		if d := fp[i].d2f; d*d <= cut {
			sum += d * d
			k++
		}
	}
	if k < 8 {
		return 0
	}
	return sum / float64(k) / (6 * 0.9733)
}

// solveNormal solves the normal equations s restricted to the columns
// idx (the response in column 4) by Gaussian elimination with partial
// pivoting.
func solveNormal(s [5][5]float64, idx []int) ([4]float64, bool) {
	m := len(idx)
	var a [4][5]float64
	for r := range m {
		for c := range m {
			a[r][c] = s[idx[r]][idx[c]]
		}
		a[r][m] = s[idx[r]][4]
	}
	for c := range m {
		p := c
		for r := c + 1; r < m; r++ {
			if math.Abs(a[r][c]) > math.Abs(a[p][c]) {
				p = r
			}
		}
		if a[p][c] == 0 {
			return [4]float64{}, false
		}
		a[c], a[p] = a[p], a[c]
		for r := c + 1; r < m; r++ {
			k := a[r][c] / a[c][c]
			for j := c; j <= m; j++ {
				a[r][j] -= k * a[c][j]
			}
		}
	}
	var x [4]float64 // an array, not a slice: no allocation a breath
	for r := m - 1; r >= 0; r-- {
		v := a[r][m]
		for j := r + 1; j < m; j++ {
			v -= a[r][j] * x[j]
		}
		x[r] = v / a[r][r]
		if math.IsNaN(x[r]) || math.IsInf(x[r], 0) {
			return [4]float64{}, false
		}
	}
	return x, true
}

// residualSS is the residual sum of squares Σ(p − x·β)² of a solution β
// over columns idx, from the normal equations: Σp² − 2β·Xᵀp + βᵀXᵀXβ.
func residualSS(s [5][5]float64, idx []int, beta *[4]float64) float64 {
	ss := s[4][4]
	for i, r := range idx {
		ss -= 2 * beta[i] * s[r][4]
		for j, c := range idx {
			ss += beta[i] * beta[j] * s[r][c]
		}
	}
	return math.Max(0, ss)
}

// r2 is the coefficient of determination of the Rohrer fit.
func (f *rohrerFit) r2() float64 {
	if !(f.sst > 0) {
		return math.NaN()
	}
	return 1 - f.sse/f.sst
}
