package analyze

import "math"

// expFitMinRatio is how much more volume than the end-expiratory-flow
// estimate the two-exponential fit must leave to mark a slow end, and
// expFitMaxRatio caps the figure it reports at this many times that
// estimate (see trapping; our choice).
const (
	expFitMinRatio = 1.5
	expFitMaxRatio = 3.0
)

// trapping computes the time constants and the air-trapping estimates of
// the breath: the expiratory time constant of mid-expiration, the
// end-expiratory time constant (slow units), and intrinsic PEEP and trapped
// volume by two independent routes, end-expiratory flow and the fitted
// total PEEP.
func (a *Analyzer) trapping(b *Breath, flags *[]string, m *mechanics, eef, eefSE, endT float64) {
	c := &a.cfg
	add := func(f string) { *flags = append(*flags, f) }
	vteOnset := a.expStartV - a.volumeAt(endT)

	tau, tauEnd, slowerEnd, marks := a.timeConstants(b, flags, m, eef, eefSE, vteOnset, endT)
	// A slow end: the last part empties with a longer time constant than
	// the middle, and there is still measurable flow to empty.
	// (or the end-expiratory flow lies above the mid-expiration line).
	flowing := eef > math.Max(tauDepartureLPS/2, 3*nanTo0(eefSE))
	slow := flowing && (tauEnd > slowEndRatio*tau || slowerEnd)
	tauTrap := tau
	if slow && tauEnd > tau {
		tauTrap = tauEnd
	}
	b.TeOverTau = b.TeS / tauTrap
	efl := math.Max(eef, 0)

	// Route 1, end-expiratory flow: the volume still to exhale is τ·|EEF|
	// (passive mono-exponential emptying), and the alveolar pressure above
	// PEEP is the resistive drop of that flow, R(EEF)·|EEF|, with Rohrer's
	// resistance taken at the end-expiratory flow, not the mean (derived).
	// Two exponentials: the volume still to exhale at the onset, from the
	// whole expiration rather than its last points.
	remML := math.NaN()
	b.TrappedEEFML = 1000 * efl * tauTrap
	// Only when the end of expiration already hints at a slower end: the
	// fit costs about a hundred microseconds, the rest of a breath a few.
	hint := flowing && (slowerEnd || tauEnd > 1.15*tau || math.IsNaN(tauEnd))
	if ef := a.fitTwoExpIf(hint, vteOnset, endT); ef.ok && ef.two && ef.tau2 > 2*ef.tau1 && ef.tau2 <= 3*b.TeS {
		// A slow component is identifiable only over an expiration of a
		// few of its time constants; and the remaining volume of a sum of
		// exponentials exceeds flow × local slope by a modest factor once
		// the fast part has decayed, so the figure is capped at
		// expFitMaxRatio times the end-expiratory route (our choice).
		remML = 1000 * ef.remaining(endT-a.expStartT)
	}
	if remML > expFitMinRatio*b.TrappedEEFML && efl > tauDepartureLPS/2 && !m.rohrer.ok {
		// The whole expiration says two time constants and more volume
		// left than the end-expiratory slope does.
		slow = true
	}
	remML = math.Min(remML, expFitMaxRatio*b.TrappedEEFML)
	b.TrappedExpFitML = remML
	r := math.NaN()
	switch {
	case m.rohrer.ok:
		r = m.rohrer.k1 + m.rohrer.k2*efl
	case m.fitOK:
		r = m.r
	case !math.IsNaN(b.ROccCmH2OSPerL):
		r = b.ROccCmH2OSPerL
	}
	b.PEEPiEEFCmH2O = efl * r
	// Route 2, the fit: P0 is the total PEEP at the start of the breath;
	// the volume the breath kept (VTi − VTe) raises it by (VTi − VTe)/C by
	// its end, when trapped volume and intrinsic PEEP are defined.
	if m.fitOK {
		b.PEEPiFitCmH2O = m.p0 - b.PEEPCmH2O + (b.VtiML-b.VteML)/1000*m.e
	}
	// A leak the balance estimate has not removed: inspired volume that
	// neither came back nor is still above relaxation volume.
	kept := b.VtiML - b.VteML
	if b.VtiML > 0 && kept-math.Max(0, nanTo0(b.TrappedEEFML)) > c.LeakFraction*b.VtiML {
		add(FlagLeak)
	}
	leak := hasFlag(*flags, FlagLeak)
	if !math.IsNaN(b.PEEPiEEFCmH2O) && !math.IsNaN(b.PEEPiFitCmH2O) {
		d := math.Abs(b.PEEPiEEFCmH2O - b.PEEPiFitCmH2O)
		tol := math.Max(c.PEEPiToleranceCmH2O, c.PEEPiToleranceFraction*math.Max(math.Abs(b.PEEPiEEFCmH2O), math.Abs(b.PEEPiFitCmH2O)))
		if d > tol {
			add(FlagPEEPiMismatch)
		}
	}
	a.reportTrapping(b, flags, m, slow, leak)
	a.poolSlowEnd(b, flags, m, slow, flowing, leak, marks)
}

// poolSlowEnd keeps the marks of a slow end of a passive breath still
// emptying (slowPool), and flags a breath whose own marks did not make it
// a bound when those of the recent breaths say its lung has units with
// unequal time constants: its figures then read low, like those of a
// breath flagged on its own (reportTrapping). Its intrinsic PEEP is left
// as it is; its trapped volume becomes, as on a breath flagged on its own,
// at least the end-expiratory flow times the time constant of the last
// third of the expiration, when that slope is determined (three standard
// errors) and slower than the middle: the slow units' share, still an
// estimate from below (Cauchy–Schwarz, reportTrapping). The air-trapping
// detector reads such a breath as it reads one flagged on its own
// (boundMagnitude); the other detectors as an unflagged one (slowEndBound).
func (a *Analyzer) poolSlowEnd(b *Breath, flags *[]string, m *mechanics, slow, flowing, leak bool, marks slowMarks) {
	if !flowing || m.effort || !(b.PEEPiCmH2O >= slowPoolMinPEEPiCmH2O) {
		return
	}
	a.slowPool.add(marks)
	if slow || leak || !a.slowPool.slow() {
		return
	}
	*flags = append(*flags, FlagPEEPiBound, FlagPEEPiBoundPooled)
	// 1 − flatten is τ/τ_end, and its standard error that of the slope
	// times τ (slowMarks).
	if k := 1 - marks.flatten; marks.flatten > 0 && k > slowPoolZ*marks.flattenSE {
		if tl := b.TauS / k; tl <= maxTauS {
			b.TrappedML = math.Max(b.TrappedML, b.EndExpFlowLPM/60*tl*1000)
		}
	}
}

// timeConstants sets the mid-expiration and end-expiratory time
// constants of b and flags a departure from a single one. It returns the
// time constant to use (the fit's R/E when the slope fails), the
// end-expiratory one, whether the end is slower than the middle, and the
// marks of a slow end for the pool (NaN where they cannot be formed).
func (a *Analyzer) timeConstants(b *Breath, flags *[]string, m *mechanics, eef, eefSE, vteOnset, endT float64) (tau, tauEnd float64, slowerEnd bool, marks slowMarks) {
	// Mid-expiration time constant from the flow–volume slope over 25–75 %
	// of the exhaled volume (Lourens MS et al., Intensive Care Med
	// 2000;26:1612: the slope of the expiratory flow–volume curve).
	var lineEEF, lineSE float64
	b.TauS, lineEEF, lineSE = a.tauFlowVolume(vteOnset, 0.25, 0.75, endT)
	// End-expiratory time constant from the last third of the expiration
	// (same source: the slope of the last part of the curve). Units with a
	// longer time constant empty last, so this slope is theirs.
	tauEnd, lateSlope, lateSlopeSE := a.tauLate(endT)
	b.TauEndS = tauEnd
	// The marks of a slow end for the pool (slowPool): how much flatter the
	// end of the flow–volume curve is than its middle, 1 − τ/τ_end from
	// the slope of the last third (no r² gate: the pool weighs each breath
	// by its standard error), and the departure of the end-expiratory flow
	// from the mid-expiration line, both relative.
	d, dSE := eef-lineEEF, math.Hypot(eefSE, lineSE)
	marks = slowMarks{flatten: 1 + lateSlope*b.TauS, flattenSE: lateSlopeSE * b.TauS,
		departure: d / eef, departureSE: dSE / eef}
	if math.Abs(d) > tauDepartureLPS && math.Abs(d) > 4*dSE {
		*flags = append(*flags, FlagTauNonlinear)
		slowerEnd = d > 0
	}
	tau = b.TauS
	if math.IsNaN(tau) {
		*flags = append(*flags, FlagTauUnreliable)
		if m.fitOK {
			tau = m.r / m.e
		}
	}
	return tau, tauEnd, slowerEnd, marks
}

// reportTrapping chooses the reported intrinsic PEEP and trapped volume.
//
// With a slow end (unequal time constants) the static, equilibrated value
// is what an end-expiratory occlusion would read: the volume still to
// exhale over the whole compliance. The end-expiratory flow times the
// end-expiratory time constant estimates that volume from below (the
// fast units have nearly emptied; by the Cauchy–Schwarz inequality the
// flow-weighted slope never overstates the remaining volume of a sum of
// exponentials), so the figure is flagged a bound and never printed as 0;
// its intrinsic PEEP is a bound that needs no compliance (staticBound).
// Otherwise the end-expiratory-flow route is reported when the fit route
// cannot be trusted (effort, leak, no fit), and the mean of the two when
// both hold: they err in different ways (flow noise and offset against
// the model's P0).
func (a *Analyzer) reportTrapping(b *Breath, flags *[]string, m *mechanics, slow, leak bool) {
	switch {
	case slow && m.fitOK:
		b.TrappedML = math.Max(b.TrappedEEFML, nanTo0(b.TrappedExpFitML))
		b.PEEPiCmH2O = math.Max(a.staticBound(b, m), nanTo0(b.PEEPiFitCmH2O))
		*flags = append(*flags, FlagPEEPiBound)
	case m.fitOK && !m.effort && !leak && !math.IsNaN(b.PEEPiEEFCmH2O):
		b.PEEPiCmH2O = math.Max(0, (b.PEEPiEEFCmH2O+b.PEEPiFitCmH2O)/2)
		b.TrappedML = b.PEEPiCmH2O / m.e * 1000
	case m.fitOK && !m.effort && !leak:
		b.PEEPiCmH2O = math.Max(0, b.PEEPiFitCmH2O)
		b.TrappedML = b.PEEPiCmH2O / m.e * 1000
	default:
		b.PEEPiCmH2O = math.Max(0, b.PEEPiEEFCmH2O)
		b.TrappedML = math.Max(0, b.TrappedEEFML)
	}
}

// volumeAt returns the volume of the open breath at time t, from the
// decimated points (linear interpolation), or the volume at the crossing
// when t is at or after it.
func (a *Analyzer) volumeAt(t float64) float64 {
	if t >= a.candT {
		return a.candV
	}
	pts := a.buf.pts[:a.buf.n]
	for i := len(pts) - 1; i > 0; i-- {
		if pts[i-1].t <= t {
			q0, q1 := &pts[i-1], &pts[i]
			if q1.t <= q0.t {
				return q1.v
			}
			w := math.Min(1, (t-q0.t)/(q1.t-q0.t))
			return q0.v + w*(q1.v-q0.v)
		}
	}
	return a.candV
}

// staticBound returns a lower bound of the static intrinsic PEEP (cmH2O)
// of a breath whose trapped volume b.TrappedML is itself a lower bound, T,
// without the fitted compliance, which a lung of unequal time constants
// makes too low (a dynamic compliance below the static one; the trapped
// volume times the fitted elastance overstated a two-unit lung by up to
// half its static value, TestTwoUnitLungBoundIsHonest). In a passive steady
// state each unit's cycle-mean pressure is the mean airway pressure, so
// the static value is P = ΔPm − M/Cs (docs/analysis.md, "What a steady
// breath cannot tell"), ΔPm the mean airway pressure above PEEP and M the
// cycle-mean volume above the end-expiratory volume; Cs·P ≥ T then gives
// Cs ≥ (T + M)/ΔPm and P ≥ ΔPm·T/(T + M) (derived). When expiration meets
// more resistance than inspiration the cycle-mean alveolar pressure is
// higher and the bound still holds. It falls back to the trapped volume
// times the fitted elastance when the means cannot be formed.
func (a *Analyzer) staticBound(b *Breath, m *mechanics) float64 {
	mv := 1000 * a.meanVolumeAbove(b.EndS)
	p := (b.MeanCmH2O - b.PEEPCmH2O) * b.TrappedML / (b.TrappedML + mv)
	if !(p >= 0) || !(mv > 0) {
		return b.TrappedML / 1000 * m.e
	}
	return p
}

// meanVolumeAbove is the mean, over the breath's decimated points before
// endT (evenly spaced in time), of the volume above the volume at endT (L);
// NaN when there is no point.
func (a *Analyzer) meanVolumeAbove(endT float64) float64 {
	vEnd := a.volumeAt(endT)
	sum, n := 0.0, 0
	for i := 0; i < a.buf.n; i++ {
		q := &a.buf.pts[i]
		if q.t >= endT {
			break
		}
		sum += q.v - vEnd
		n++
	}
	if n == 0 {
		return math.NaN()
	}
	return sum / float64(n)
}
