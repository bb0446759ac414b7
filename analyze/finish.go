package analyze

import "math"

// Plausible range of the expiratory time constant; outside it the
// flow–volume estimate is discarded.
const (
	minTauS = 0.02
	maxTauS = 20.0
)

// slowEndRatio is the ratio of the end-expiratory to the mid-expiratory
// time constant from which the end of expiration counts as slower than a
// single compartment: the mark of units with unequal time constants (our
// choice; a single linear compartment gives 1 within a few per cent).
const slowEndRatio = 1.3

// mechanics is what the fits of one breath found.
type mechanics struct {
	fitOK  bool
	effort bool
	r, e   float64 // resistance (at the mean inspiratory flow) and elastance
	p0     float64
	rohrer rohrerFit
}

// finish computes the record of the open breath. Its expiration ends at
// the onset of the next inspiratory rise (see inspOnset); the volumes run
// to the flow crossing a.candT (volume a.candV).
func (a *Analyzer) finish() Breath {
	b := NewBreath()
	b.Stream = a.stream
	b.Seq = a.seq
	a.seq++
	endT, eeT := a.inspOnset(a.candT)
	a.nextStartT = endT

	b.StartS = a.startT
	b.EndS = endT
	b.TiS = a.expStartT - a.startT
	b.TeS = endT - a.expStartT
	b.RateBPM = 60 / (endT - a.startT)
	b.VtiML = 1000 * a.expStartV
	b.VteML = 1000 * (a.expStartV - a.candV)
	b.FlowOffsetLPM = 60 * a.offB
	b.LeakLPMPerCmH2O = 60 * a.leakK

	seg := &a.cur
	if seg.n > 0 {
		b.PeakCmH2O = seg.maxP
		b.MeanCmH2O = seg.p / seg.n
		b.PeakInspFlowLPM = 60 * math.Max(seg.maxF, 0)
		b.PeakExpFlowLPM = 60 * math.Max(-seg.minF, 0)
	}

	// End of expiration, just before the onset of the rise (eeT, within
	// the sampling step before endT): mean pressure, and flow extrapolated
	// to it by a line fit so that a still-falling flow is read at the end,
	// not at the middle of the window.
	eef, eefSE := math.NaN(), math.NaN()
	if mp, fe, se, n := a.ring.endWindow(eeT-a.cfg.EndExpWindowS, eeT); n > 0 {
		b.PEEPCmH2O = mp
		b.EndExpFlowLPM = 60 * math.Max(-fe, 0)
		eef, eefSE = -fe, se
	}
	// An end-expiratory hold: the window above lies in it, so the PEEP
	// is the pressure before it (see expHold).
	hold, isHold := a.expHold(eeT)
	if isHold {
		b.PEEPCmH2O = hold.peepCmH2O
	}

	// One allocation a breath (the record keeps its flags), sized for the
	// usual count so that appending does not grow it.
	flags := make([]string, 0, 8)
	if !math.IsNaN(a.plateau) {
		flags = append(flags, FlagPause)
		b.PlateauCmH2O = a.plateau
	} else {
		flags = append(flags, FlagNoPause)
	}
	if a.artifact {
		flags = append(flags, FlagArtifact)
	}
	if b.VtiML < a.cfg.MinBreathVolumeML {
		flags = append(flags, FlagShort)
	}
	if math.Abs(a.offB+a.leakK*a.meanP) >= minFlagLPS {
		flags = append(flags, FlagOffsetCorrected)
	}
	b.Mode = a.inferMode(b.PEEPCmH2O)
	m := a.mechanicsOf(&b, &flags, endT)
	a.trapping(&b, &flags, &m, eef, eefSE, endT)
	if isHold {
		a.applyHold(&b, &flags, &m, hold)
	}
	corr := a.inspCorrection()
	a.settings.observe(&b, &flags, a.pauseLen, a.cur.maxF, corr)
	b.Flags = flags
	a.updateBalance(&b, corr)
	return b
}

// mechanicsOf fits the equation of motion over the breath, linear (Bates
// JHT, Lung Mechanics, 2009) and, when the residuals grow with flow or the
// linear fit fails in a way a steep flow dependence explains, with a
// Rohrer resistance; tests the inspiration for muscle effort; and applies
// the occlusion method over an end-inspiratory pause.
func (a *Analyzer) mechanicsOf(b *Breath, flags *[]string, endT float64) mechanics {
	c := &a.cfg
	seg := &a.cur
	add := func(f string) { *flags = append(*flags, f) }
	var m mechanics
	fr := seg.fit()
	// rescue: the linear model failed for a reason a flow-dependent
	// resistance can cause (see rohrerRescue); its flag waits for the try.
	rescue, implausible := false, false
	switch {
	case fr.singular:
		add(FlagFitSingular)
	case fr.r < 0 && fr.e < 0:
		add(FlagFlowReversed)
		add(FlagFitImplausible)
	case fr.e <= 0:
		// A negative elastance is what inspiratory muscle effort does to
		// a passive model (structured residuals, negative C).
		m.effort = true
		rescue, implausible = true, true
	case fr.r < 0 || fr.r > c.MaxRCmH2OSPerL || 1000/fr.e > c.MaxCMLPerCmH2O || fr.r2 < c.MinFitR2:
		rescue, implausible = true, true
	default:
		m.fitOK = true
		m.r, m.e, m.p0 = fr.r, fr.e, fr.p0
		b.FitR2 = fr.r2
	}
	rScale := math.NaN()
	if m.fitOK {
		rScale = fr.r
	}
	if dev, noise := a.inspResidual(rScale, 0); dev > math.Max(c.EffortDipCmH2O, 4*noise) {
		m.effort = true
		rescue = rescue || m.fitOK
	}
	switch {
	case rescue && a.rohrerRescue(&m, endT):
		b.FitR2 = m.rohrer.r2()
	case implausible:
		add(FlagFitImplausible)
	case m.fitOK && !m.effort:
		a.rohrerPassive(&m, endT)
	}
	if rf := &m.rohrer; rf.ok {
		// R is reported at the mean inspiratory flow, E and P0 come from
		// the same fit.
		mean := b.VtiML / 1000 / math.Max(b.TiS-nanTo0(a.pauseLenOK()), 1e-3)
		m.r, m.e, m.p0 = rf.k1+rf.k2*mean, rf.e, rf.p0
		b.RK1CmH2OSPerL, b.RK2CmH2OS2PerL2 = rf.k1, rf.k2
		add(FlagRohrer)
		if rf.pooled {
			add(FlagRohrerPooled)
		}
	}
	if m.fitOK && !m.effort {
		b.RCmH2OSPerL = m.r
		b.CMLPerCmH2O = 1000 / m.e
		b.PTot0CmH2O = m.p0
	}
	if m.effort {
		add(FlagEffort)
	}

	a.occlusion(b, &m)
	return m
}

// rohrerPassive fits Rohrer's equation to a passive breath whose linear
// fit holds, and sets m.rohrer when it explains the residuals, or when the
// recent breaths together show the flow dependence and this one does not
// contradict it. It fits only while flow dependence shows, or on every few
// breaths to keep the pool fed (see rohrerPool.wanted).
func (a *Analyzer) rohrerPassive(m *mechanics, endT float64) {
	c := &a.cfg
	if !a.k2Pool.wanted() {
		a.k2Pool.skip()
		return
	}
	rf := fitRohrer(a.buf.pts[:a.buf.n], endT)
	a.k2Pool.add(&rf, m.r)
	if rf.ok && 1000/rf.e <= c.MaxCMLPerCmH2O {
		m.rohrer = rf
	} else if k2, sig := a.k2Pool.k2(m.r); sig {
		if pf, ok := rf.withK2(k2); ok && 1000/pf.e <= c.MaxCMLPerCmH2O {
			m.rohrer = pf
		}
	}
}

// occlusion applies the occlusion method over the end-inspiratory pause
// (Bates JHT, Rossi A, Milic-Emili J, J Appl Physiol 1985): R = (Ppeak −
// Pplat)/V' with the flow at the peak, Cstat = VT/(Pplat − total PEEP).
// Total PEEP is the fitted P0 when the fit holds, else the measured
// end-expiratory pressure.
func (a *Analyzer) occlusion(b *Breath, m *mechanics) {
	seg := &a.cur
	if !math.IsNaN(b.PlateauCmH2O) {
		if seg.maxPFlow > a.trigLPS {
			if r := (b.PeakCmH2O - b.PlateauCmH2O) / seg.maxPFlow; r >= 0 {
				b.ROccCmH2OSPerL = r
			}
		}
		tot := b.PEEPCmH2O
		if m.fitOK {
			tot = m.p0
		}
		if d := b.PlateauCmH2O - tot; d > 0 && b.VtiML > 0 {
			b.CStatMLPerCmH2O = b.VtiML / d
		}
	}
}

// rohrerRescueGain is the share of the linear fit's residual sum of squares
// that Rohrer's equation must remove to stand in for a linear fit that
// failed (our choice: a strong flow dependence, not a subtle one; the
// breaths that need it, at 100 cmH2O·s/L and more, show 0.97–0.99).
const rohrerRescueGain = 0.5

// rohrerRescue fits Rohrer's equation to a breath whose linear fit failed
// (compliance out of range or negative, low r²) or whose inspiration
// departed from the linear model. A resistance that grows steeply with flow
// does both under a decelerating flow: the linear model bends the
// elastance to follow K2·V'·|V'| (at 120 cmH2O·s/L, C above 400 mL/cmH2O
// or negative) and its inspiratory residuals look like an effort. The
// rescue holds when the Rohrer fit is significant and physical (see
// fitRohrer), removes rohrerRescueGain of the linear residual, reaches
// min_fit_r2 and a compliance within range, and the inspiration follows
// it (the effort test against P − K2·V'·|V'|). It then sets m as a passive
// Rohrer breath and returns true; otherwise it leaves m alone.
func (a *Analyzer) rohrerRescue(m *mechanics, endT float64) bool {
	c := &a.cfg
	rf := fitRohrer(a.buf.pts[:a.buf.n], endT)
	if !rf.ok || 1000/rf.e > c.MaxCMLPerCmH2O || rf.k1+rf.k2 > c.MaxRCmH2OSPerL ||
		rf.sseLin-rf.sse < rohrerRescueGain*rf.sseLin || !(rf.r2() >= c.MinFitR2) {
		return false
	}
	if dev, noise := a.inspResidual(rf.k1, rf.k2); dev > math.Max(c.EffortDipCmH2O, 4*noise) {
		return false
	}
	m.fitOK, m.effort, m.rohrer = true, false, rf
	return true
}

// pauseLenOK is the length of the end-inspiratory pause when one was
// found, else NaN.
func (a *Analyzer) pauseLenOK() float64 {
	if math.IsNaN(a.plateau) {
		return math.NaN()
	}
	return a.pauseLen
}

// scaledTrigger is the trigger flow (L/s) of a phase change after an
// inspiration whose peak flow was peakLPS: trigger_fraction of it, between
// min_trigger_flow_lpm and trigger_flow_lpm. A fixed 3 L/min missed the
// expirations of breaths whose flows are a few L/min (a resistance of
// 120 cmH2O·s/L under pressure control: about 5 L/min in, 3 out), which
// then merged with the next; scaled to the inspiration, the expiration
// that follows it and the next inspiration are seen.
func (a *Analyzer) scaledTrigger(peakLPS float64) float64 {
	// Plain comparisons, not math.Max: small enough to be inlined where
	// it runs, for every inspiratory sample.
	t := a.cfg.TriggerFraction * peakLPS
	if t > a.trigMaxLPS {
		return a.trigMaxLPS
	}
	if t < a.trigMinLPS {
		return a.trigMinLPS
	}
	return t
}
