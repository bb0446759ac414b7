package analyze

import "math"

func nanTo0(v float64) float64 {
	if math.IsNaN(v) {
		return 0
	}
	return v
}

func hasFlag(flags []string, f string) bool {
	for _, g := range flags {
		if g == f {
			return true
		}
	}
	return false
}

// effortWindowS is the span over which fit residuals are averaged before
// looking for a dip: short against a muscle effort (0.5–1 s), long enough
// that sensor noise averages out.
const effortWindowS = 0.2

// inspResidual tests whether the inspiration follows the passive equation
// of motion P = R·V' + E·V + P0, fitted to the inspiration alone (start of
// the breath to the start of expiration, pause included). It returns the
// largest departure, averaged over effortWindowS and expressed in cmH2O, and
// the noise of that average; the caller compares the two.
//
// A passive patient follows the model closely there, even with a
// flow-dependent resistance under constant flow (the Rohrer term is then a
// constant); inspiratory muscle effort bends the curves in a way no R, E and
// P0 can follow. The departure shows in pressure when the ventilator sets
// the flow (volume control), and in flow when it sets the pressure
// (pressure control), so both are tested: pressure regressed on flow and
// volume, and flow regressed on pressure and volume (its residual scaled to
// pressure by rScale, the breath's fitted R; skipped when rScale is
// unknown). A regression whose regressors are collinear is reduced (constant
// flow) or skipped (pressure and volume collinear, which is the square-flow
// case the first test covers).
//
// k2, when not zero, is a Rohrer coefficient: K2·V'·|V'| is taken off the
// pressure first, so that the test is against P = K1·V' + K2·V'·|V'| +
// E·V + P0 (rScale is then K1).
func (a *Analyzer) inspResidual(rScale, k2 float64) (dev, noise float64) {
	n := 0
	for n < a.buf.n && a.buf.pts[n].t < a.expStartT {
		n++
	}
	pts := a.buf.pts[:n]
	if n < 6 {
		return 0, 0
	}
	step := (pts[n-1].t - pts[0].t) / float64(n-1)
	k := 1
	if step > 0 {
		k = max(1, int(effortWindowS/step+0.5))
	}
	k = min(k, n)

	// The sums of segment.add, in locals (registers, not memory) and in
	// the same order; the extremes are not needed here.
	var sn, sF, sV, sP, sFF, sFV, sVV, sFP, sVP, sPP float64
	for i := range pts {
		f, v, p := pts[i].f, pts[i].v, pts[i].p
		if k2 != 0 {
			p -= k2 * f * math.Abs(f)
		}
		sn++
		sF += f
		sV += v
		sP += p
		sFF += f * f
		sFV += f * v
		sVV += v * v
		sFP += f * p
		sVP += v * p
		sPP += p * p
	}
	s := segment{n: sn, f: sF, v: sV, p: sP, ff: sFF, fv: sFV, vv: sVV, fp: sFP, vp: sVP, pp: sPP}
	// The sums of flow regressed on pressure and volume are those of
	// pressure on flow and volume with flow and pressure swapped: the same
	// products added in the same order (a product of two float64 does not
	// depend on their order), so no second pass is needed.
	sf := segment{n: s.n, f: s.p, v: s.v, p: s.f, ff: s.pp, fv: s.vp, vv: s.vv, fp: s.fp, vp: s.fv, pp: s.ff}
	fr := s.fit()
	if fr.singular {
		// Constant flow: P = E·V + P1 by simple regression.
		mv, mp := s.v/s.n, s.p/s.n
		svv := s.vv - s.n*mv*mv
		if !(svv > 0) {
			return 0, 0
		}
		e := (s.vp - s.n*mv*mp) / svv
		fr = fitResult{r: 0, e: e, p0: mp - e*mv}
	}
	// Each residual is computed once, into rs, by a plain loop (a function
	// value per point costs an indirect call that cannot be inlined).
	var rs [bufCap]float64
	pressureResiduals(rs[:n], pts, fr, k2)
	dev, noise = windowedResidual(rs[:n], k)
	if ff := sf.fit(); !ff.singular && rScale > 0 {
		flowResiduals(rs[:n], pts, ff, rScale, k2)
		d, nz := windowedResidual(rs[:n], k)
		if d-4*nz > dev-4*noise {
			dev, noise = d, nz
		}
	}
	return dev, noise
}

// pressureResiduals sets rs to the residuals of pressure (less the Rohrer
// term k2·V'·|V'|, nothing when k2 is zero) against the regression fr on
// flow and volume: a plain loop, as a function value per point would cost
// an indirect call that cannot be inlined.
func pressureResiduals(rs []float64, pts []point, fr fitResult, k2 float64) {
	for i := range pts {
		q := &pts[i]
		rs[i] = q.p - k2*q.f*math.Abs(q.f) - (fr.r*q.f + fr.e*q.v + fr.p0)
	}
}

// flowResiduals sets rs to the residuals of flow against the regression ff
// on pressure (less the Rohrer term k2·V'·|V'|) and volume, scaled to
// pressure by rScale.
func flowResiduals(rs []float64, pts []point, ff fitResult, rScale, k2 float64) {
	for i := range pts {
		q := &pts[i]
		rs[i] = rScale * (q.f - (ff.r*(q.p-k2*q.f*math.Abs(q.f)) + ff.e*q.v + ff.p0))
	}
}

// windowedResidual returns the largest |mean| of the residuals rs over k
// consecutive points, and the noise of such a mean estimated from
// successive differences (white noise: twice its variance), which a smooth
// departure does not inflate.
func windowedResidual(rs []float64, k int) (worst, noise float64) {
	n := len(rs)
	sum, sd, prev := 0.0, 0.0, 0.0
	// The largest |sum|, divided by k once at the end: a correctly rounded
	// division by a positive number never reverses an order, so the
	// largest quotient is the quotient of the largest sum.
	worstSum := 0.0
	for i, r := range rs {
		if i > 0 {
			sd += (r - prev) * (r - prev)
		}
		prev = r
		sum += r
		if i >= k {
			sum -= rs[i-k]
		}
		if i >= k-1 {
			if m := math.Abs(sum); m > worstSum {
				worstSum = m
			}
		}
	}
	noise = math.Sqrt(sd/float64(2*(n-1))) / math.Sqrt(float64(k))
	return worstSum / float64(k), noise
}

// linreg accumulates a simple linear regression y = a + b·x.
type linreg struct{ n, sx, sy, sxx, sxy, syy float64 }

func (l *linreg) add(x, y float64) {
	l.n++
	l.sx += x
	l.sy += y
	l.sxx += x * x
	l.sxy += x * y
	l.syy += y * y
}

// ols returns the means of x and y, the slope, the residual standard
// deviation s (over n − 2) and Sxx of the ordinary least-squares line; ok
// is false below three points or when x does not vary.
func (l *linreg) ols() (mx, my, b, s, cxx float64, ok bool) {
	if l.n < 3 {
		return
	}
	mx, my = l.sx/l.n, l.sy/l.n
	cxx = l.sxx - l.n*mx*mx
	cxy := l.sxy - l.n*mx*my
	if !(cxx > 0) {
		return
	}
	b = cxy / cxx
	s = math.Sqrt(math.Max(0, l.syy-l.n*my*my-b*cxy) / (l.n - 2))
	return mx, my, b, s, cxx, true
}

// predict returns the fitted y at x and its standard error (ordinary least
// squares: s·√(1/n + (x − x̄)²/Sxx)); NaN below three points.
func (l *linreg) predict(x float64) (y, se float64) {
	mx, my, b, s, cxx, ok := l.ols()
	if !ok {
		return math.NaN(), math.NaN()
	}
	return my + b*(x-mx), s * math.Sqrt(1/l.n+(x-mx)*(x-mx)/cxx)
}

// slope returns the fitted slope and its standard error (ordinary least
// squares: s/√Sxx); NaN below three points.
func (l *linreg) slope() (b, se float64) {
	_, _, b, s, cxx, ok := l.ols()
	if !ok {
		return math.NaN(), math.NaN()
	}
	return b, s / math.Sqrt(cxx)
}

// r2 returns the squared correlation of x and y, or NaN below three
// points.
func (l *linreg) r2() float64 {
	if l.n < 3 {
		return math.NaN()
	}
	cxx := l.sxx - l.sx*l.sx/l.n
	cyy := l.syy - l.sy*l.sy/l.n
	cxy := l.sxy - l.sx*l.sy/l.n
	if !(cxx > 0 && cyy > 0) {
		return math.NaN()
	}
	return cxy * cxy / (cxx * cyy)
}

// tau returns −1/slope when the slope is defined and negative enough to
// give a plausible time constant, else NaN.
func (l *linreg) tau() float64 {
	if l.n < 3 {
		return math.NaN()
	}
	den := l.n*l.sxx - l.sx*l.sx
	if !(den > 0) {
		return math.NaN()
	}
	tau := -1 / ((l.n*l.sxy - l.sx*l.sy) / den)
	if !(tau >= minTauS && tau <= maxTauS) {
		return math.NaN()
	}
	return tau
}

// tauDepartureLPS is the smallest departure of the end-expiratory flow
// from the mid-expiration flow–volume line that counts (2 L/min; it must
// also exceed four standard errors).
const tauDepartureLPS = 2.0 / 60

// tauMinR2 is the smallest squared correlation of the flow–volume line
// that gives a time constant (our choice: below it the segment is noise or
// not a line).
const tauMinR2 = 0.8

// tauFlowVolume fits |V'| = a − V_ex/τ over the decimated expiration
// points before endT whose exhaled volume V_ex lies between lo and hi
// (fractions) of vte (L). In passive mono-exponential emptying the volume
// still to exhale is τ·|V'|, so the slope of the flow–volume curve is −1/τ
// (Lourens MS et al., Intensive Care Med 2000;26:1612). It returns NaN when
// fewer than three points qualify or the slope is not plausible. It also
// returns the line's |V'| at V_ex = vte (the end of expiration) and the
// standard error of that extrapolation.
func (a *Analyzer) tauFlowVolume(vte, lo, hi, endT float64) (tau, endFlow, endSE float64) {
	nan := math.NaN()
	if !(vte > 0) {
		return nan, nan, nan
	}
	lo, hi = lo*vte, hi*vte
	var n, sx, sy, sxx, sxy, syy float64 // linreg.add in registers
	for i := 0; i < a.buf.n; i++ {
		q := &a.buf.pts[i]
		if q.t < a.expStartT {
			continue
		}
		if q.t >= endT {
			break
		}
		if x := a.expStartV - q.v; x >= lo && x <= hi {
			y := -q.f
			n++
			sx += x
			sy += y
			sxx += x * x
			sxy += x * y
			syy += y * y
		}
	}
	l := linreg{n, sx, sy, sxx, sxy, syy}
	tau = l.tau()
	if math.IsNaN(tau) || !(l.r2() >= tauMinR2) {
		return nan, nan, nan
	}
	endFlow, endSE = l.predict(vte)
	return tau, endFlow, endSE
}

// tauLate returns the end-expiratory time constant: the inverse slope of
// the flow–volume curve over the last third of the expiratory time before
// endT (Lourens MS et al., Intensive Care Med 2000;26:1612, use the last
// part of the curve). The last third in time rather than in volume: units
// with a long time constant hold little of the exhaled volume but most of
// the late flow, so a volume window would still see the fast units.
//
// It also returns the slope itself and its standard error, whatever the
// line's r² (the marks of a slow end, slowMarks, weigh it by its error).
func (a *Analyzer) tauLate(endT float64) (tau, slope, slopeSE float64) {
	from := a.expStartT + (endT-a.expStartT)*2/3
	var n, sx, sy, sxx, sxy, syy float64 // linreg.add in registers
	for i := 0; i < a.buf.n; i++ {
		q := &a.buf.pts[i]
		if q.t < from {
			continue
		}
		if q.t >= endT {
			break
		}
		x, y := a.expStartV-q.v, -q.f
		n++
		sx += x
		sy += y
		sxx += x * x
		sxy += x * y
		syy += y * y
	}
	l := linreg{n, sx, sy, sxx, sxy, syy}
	slope, slopeSE = l.slope()
	tau = l.tau()
	if math.IsNaN(tau) || !(l.r2() >= tauMinR2) {
		tau = math.NaN()
	}
	return tau, slope, slopeSE
}
