package analyze

import "math"

// Plausible range of the expiratory time constant; outside it the
// flow–volume estimate is discarded.
const (
	minTauS = 0.02
	maxTauS = 20.0
)

// finish computes the record of the open breath, which ends at the crossing
// a.candT with volume a.candV.
func (a *Analyzer) finish() Breath {
	b := NewBreath()
	b.Stream = a.stream
	b.Seq = a.seq
	a.seq++
	c := &a.cfg
	endT := a.candT

	b.StartS = a.startT
	b.EndS = endT
	b.TiS = a.expStartT - a.startT
	b.TeS = endT - a.expStartT
	b.RateBPM = 60 / (endT - a.startT)
	b.VtiML = 1000 * a.expStartV
	b.VteML = 1000 * (a.expStartV - a.candV)

	seg := &a.cur
	if seg.n > 0 {
		b.PeakCmH2O = seg.maxP
		b.MeanCmH2O = seg.p / seg.n
		b.PeakInspFlowLPM = 60 * math.Max(seg.maxF, 0)
		b.PeakExpFlowLPM = 60 * math.Max(-seg.minF, 0)
	}

	// End of expiration: mean pressure, and flow extrapolated to the end by
	// a line fit so that a still-falling flow is read at the end, not at the
	// middle of the window.
	eefSigned, eefSE := math.NaN(), math.NaN()
	if mp, fe, se, n := a.ring.window(endT-c.EndExpWindowS, endT); n > 0 {
		b.PEEPCmH2O = mp
		b.EndExpFlowLPM = 60 * math.Max(-fe, 0)
		eefSigned, eefSE = -fe, se
	}

	var flags []string
	add := func(f string) { flags = append(flags, f) }

	if !math.IsNaN(a.plateau) {
		add(FlagPause)
		b.PlateauCmH2O = a.plateau
	} else {
		add(FlagNoPause)
	}
	if a.artifact {
		add(FlagArtifact)
	}
	if b.VtiML < c.MinBreathVolumeML {
		add(FlagShort)
	}

	// Equation of motion over the whole breath (Bates 2009): P0 is the total
	// PEEP of a passive linear single compartment.
	effort := false
	fr := seg.fit()
	fitOK := false
	switch {
	case fr.singular:
		add(FlagFitSingular)
	case fr.r < 0 && fr.e < 0:
		add(FlagFlowReversed)
		add(FlagFitImplausible)
	case fr.e <= 0:
		// A negative elastance is what inspiratory muscle effort does to
		// a passive model (a failed fit shows as structured residuals, negative C).
		effort = true
		add(FlagFitImplausible)
	case fr.r < 0 || fr.r > c.MaxRCmH2OSPerL || 1000/fr.e > c.MaxCMLPerCmH2O || fr.r2 < c.MinFitR2:
		add(FlagFitImplausible)
	default:
		fitOK = true
		b.RCmH2OSPerL = fr.r
		b.CMLPerCmH2O = 1000 / fr.e
		b.PTot0CmH2O = fr.p0
		b.FitR2 = fr.r2
	}
	rScale := math.NaN()
	if fitOK {
		rScale = fr.r
	}
	if dev, noise := a.inspResidual(rScale); dev > math.Max(c.EffortDipCmH2O, 4*noise) {
		effort = true
	}
	if effort {
		add(FlagEffort)
	}

	// Occlusion method over the end-inspiratory pause (Bates, Rossi,
	// Milic-Emili 1985): R = (Ppeak − Pplat)/V' with the flow at the peak,
	// Cstat = VT/(Pplat − total PEEP). Total PEEP is the fitted P0 when the
	// fit holds, else the measured end-expiratory pressure.
	if !math.IsNaN(b.PlateauCmH2O) {
		if seg.maxPFlow > a.trigLPS {
			if r := (b.PeakCmH2O - b.PlateauCmH2O) / seg.maxPFlow; r >= 0 {
				b.ROccCmH2OSPerL = r
			}
		}
		tot := b.PEEPCmH2O
		if fitOK {
			tot = b.PTot0CmH2O
		}
		if d := b.PlateauCmH2O - tot; d > 0 && b.VtiML > 0 {
			b.CStatMLPerCmH2O = b.VtiML / d
		}
	}

	// Expiratory time constant from the flow–volume slope over 25–75 % of
	// the exhaled volume (docs/formulas.md; Lourens' slope method).
	var lineEEF, lineSE float64
	b.TauS, lineEEF, lineSE = a.tauFlowVolume(b.VteML / 1000)
	// The end of expiration against the single time constant of its
	// middle: the flow–volume line of 25–75 % extrapolated to the whole
	// exhaled volume predicts the end-expiratory flow. Slower at the end
	// (flow above the line) is the mark of units with longer time
	// constants, whose trapped volume both routes underestimate; faster
	// (below) of a resistance that grows with flow.
	if d := eefSigned - lineEEF; math.Abs(d) > tauDepartureLPS && math.Abs(d) > 4*math.Hypot(eefSE, lineSE) {
		add(FlagTauNonlinear)
	}
	tau := b.TauS
	if math.IsNaN(tau) {
		add(FlagTauUnreliable)
		if fitOK {
			tau = fr.r / fr.e
		}
	}
	b.TeOverTau = b.TeS / tau

	// Air trapping at the end of the breath, two independent routes
	// (the linear single-compartment model, docs/formulas.md): from end-expiratory flow, V_trap ≈ τ·|EEF| and
	// PEEPi ≈ R·|EEF|; from the fit, PEEPi = P0 − end-expiratory pressure
	// (plus the volume balance of the breath) and V_trap = PEEPi·C.
	eef := b.EndExpFlowLPM / 60
	b.TrappedEEFML = 1000 * eef * tau
	r := math.NaN()
	if fitOK {
		r = fr.r
	} else if !math.IsNaN(b.ROccCmH2OSPerL) {
		r = b.ROccCmH2OSPerL
	}
	b.PEEPiEEFCmH2O = eef * r
	if fitOK {
		// P0 is the total PEEP at the start of the breath; the volume the
		// breath kept (VTi − VTe) raises it by (VTi − VTe)/C by its end,
		// which is when trapped volume and intrinsic PEEP are defined. (With
		// a leak the balance overstates it; the breath is then flagged and
		// the reported estimate takes the other route.)
		b.PEEPiFitCmH2O = fr.p0 - b.PEEPCmH2O + (b.VtiML-b.VteML)/1000*fr.e
	}
	// A leak: inspired volume that neither came back nor is still above
	// relaxation volume at the end of the breath. Volume kept during a
	// build-up of trapping is not a leak: it is still in the lung, and the
	// end-expiratory flow says so (V_trap ≈ τ·|EEF|).
	kept := b.VtiML - b.VteML
	if b.VtiML > 0 && kept-math.Max(0, nanTo0(b.TrappedEEFML)) > c.LeakFraction*b.VtiML {
		add(FlagLeak)
	}
	leak := hasFlag(flags, FlagLeak)
	if !math.IsNaN(b.PEEPiEEFCmH2O) && !math.IsNaN(b.PEEPiFitCmH2O) {
		d := math.Abs(b.PEEPiEEFCmH2O - b.PEEPiFitCmH2O)
		tol := math.Max(c.PEEPiToleranceCmH2O, c.PEEPiToleranceFraction*math.Max(math.Abs(b.PEEPiEEFCmH2O), math.Abs(b.PEEPiFitCmH2O)))
		if d > tol {
			add(FlagPEEPiMismatch)
		}
	}
	// The reported estimate: the fit route when the breath is passive, has
	// no leak and the fit holds (it uses every sample, so it is the least
	// noisy), else the end-expiratory-flow route. Negative values from noise around zero
	// are reported as zero: there is no negative trapped volume.
	if fitOK && !effort && !leak {
		b.PEEPiCmH2O = math.Max(0, b.PEEPiFitCmH2O)
		b.TrappedML = b.PEEPiCmH2O * b.CMLPerCmH2O
	} else {
		b.PEEPiCmH2O = math.Max(0, b.PEEPiEEFCmH2O)
		b.TrappedML = math.Max(0, b.TrappedEEFML)
	}
	b.Flags = flags
	return b
}

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
func (a *Analyzer) inspResidual(rScale float64) (dev, noise float64) {
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

	var s, sf segment
	for i := range pts {
		s.add(pts[i].f, pts[i].v, pts[i].p)
		sf.add(pts[i].p, pts[i].v, pts[i].f)
	}
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
	dev, noise = windowedResidual(pts, k, func(q *point) float64 { return q.p - (fr.r*q.f + fr.e*q.v + fr.p0) })
	if ff := sf.fit(); !ff.singular && rScale > 0 {
		d, nz := windowedResidual(pts, k, func(q *point) float64 { return rScale * (q.f - (ff.r*q.p + ff.e*q.v + ff.p0)) })
		if d-4*nz > dev-4*noise {
			dev, noise = d, nz
		}
	}
	return dev, noise
}

// windowedResidual returns the largest |mean| of res over k consecutive
// points, and the noise of such a mean estimated from successive
// differences (white noise: twice its variance), which a smooth departure
// does not inflate.
func windowedResidual(pts []point, k int, res func(*point) float64) (worst, noise float64) {
	n := len(pts)
	sum, sd, prev := 0.0, 0.0, 0.0
	for i := range pts {
		r := res(&pts[i])
		if i > 0 {
			sd += (r - prev) * (r - prev)
		}
		prev = r
		sum += r
		if i >= k {
			sum -= res(&pts[i-k])
		}
		if i >= k-1 {
			worst = math.Max(worst, math.Abs(sum)/float64(k))
		}
	}
	noise = math.Sqrt(sd/float64(2*(n-1))) / math.Sqrt(float64(k))
	return worst, noise
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

// predict returns the fitted y at x and its standard error (ordinary least
// squares: s·√(1/n + (x − x̄)²/Sxx)); NaN below three points.
func (l *linreg) predict(x float64) (y, se float64) {
	if l.n < 3 {
		return math.NaN(), math.NaN()
	}
	mx, my := l.sx/l.n, l.sy/l.n
	cxx := l.sxx - l.n*mx*mx
	cxy := l.sxy - l.n*mx*my
	if !(cxx > 0) {
		return math.NaN(), math.NaN()
	}
	b := cxy / cxx
	ss := math.Max(0, l.syy-l.n*my*my-b*cxy)
	return my + b*(x-mx), math.Sqrt(ss/(l.n-2)) * math.Sqrt(1/l.n+(x-mx)*(x-mx)/cxx)
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

// tauFlowVolume fits |V'| = a − V_ex/τ over the decimated expiration points
// whose exhaled volume V_ex lies between 25 and 75 % of vte (L). In passive
// mono-exponential emptying the volume still to exhale is τ·|V'|, so the
// slope of the flow–volume curve is −1/τ; the middle of expiration avoids
// the valve transient at its start and the noise floor at its end. It
// returns NaN when fewer than three points qualify or the slope is not
// plausible. It also returns the line's |V'| at V_ex = vte (the end of
// expiration) and the standard error of that extrapolation.
func (a *Analyzer) tauFlowVolume(vte float64) (tau, endFlow, endSE float64) {
	nan := math.NaN()
	if !(vte > 0) {
		return nan, nan, nan
	}
	lo, hi := 0.25*vte, 0.75*vte
	var l linreg
	for i := 0; i < a.buf.n; i++ {
		q := &a.buf.pts[i]
		if q.t < a.expStartT {
			continue
		}
		if q.t >= a.candT {
			break
		}
		if x := a.expStartV - q.v; x >= lo && x <= hi {
			l.add(x, -q.f)
		}
	}
	tau = l.tau()
	if math.IsNaN(tau) {
		return nan, nan, nan
	}
	endFlow, endSE = l.predict(vte)
	return tau, endFlow, endSE
}
