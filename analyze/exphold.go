package analyze

import (
	"math"
	"slices"
)

// An end-expiratory hold (occlusion) shuts the ventilator's valves at the
// end of an expiration: no more gas leaves, the units of the lung share
// their pressures, and the airway pressure rises to the static total PEEP.
// Its excess over the set PEEP is the static intrinsic PEEP, the reference
// the breath-by-breath estimates approximate (Pepe PE, Marini JJ, Am Rev
// Respir Dis 1982;126:166). A hold shows in the waveform as an expiration
// that ends in a stretch without flow, in a breath longer than the set
// cycle, with the airway pressure above the pressure before it.

// Flags of a breath whose expiration ended in a hold.
const (
	// FlagExpHold: the expiration ended in an end-expiratory hold (no flow
	// for at least exp_hold_min_s, in a breath that much longer than the
	// set cycle); intrinsic PEEP is the static value read from it
	// (peepi_hold_cmh2o), and peep_cmh2o the pressure before it.
	FlagExpHold = "exp-hold"
	// FlagHoldUnsettled: with exp-hold, the pressure was still rising at
	// the end of the hold (units with unequal time constants still sharing
	// their gas); the value read is a lower bound, and the breath is also
	// flagged peepi-bound.
	FlagHoldUnsettled = "hold-unsettled"
)

// Thresholds of the recognition and of the reading (ours).
const (
	// holdMinRiseCmH2O is the least rise of the airway pressure over the
	// pressure before the stretch without flow for it to count as a hold:
	// without it the valve may as well have been open (a lung that had
	// finished emptying, or the first breaths at a lower rate), and the
	// breath's usual estimate then reads the same near-zero value.
	holdMinRiseCmH2O = 0.3
	// holdReleaseS is how long before the onset of the next breath the
	// hold may have ended (see expHold).
	holdReleaseS = 0.4
	// holdSettledCmH2O is the rise between the last two windows of a hold
	// below which its pressure counts as settled (or three standard errors
	// of that rise, if larger).
	holdSettledCmH2O = 0.05
)

// holdReading is what a hold at the end of a breath read.
type holdReading struct {
	lenS      float64 // from the valves shutting to the onset of the next breath
	peepCmH2O float64 // the airway pressure just before the hold
	totCmH2O  float64 // the total PEEP read at its end
	unsettled bool    // still rising: totCmH2O is a lower bound
}

// expHold looks for an end-expiratory hold ending at eeT, the end of the
// breath's expiration, in the breath's decimated points. The stretch
// without flow is the run of points before eeT whose |flow| stays within
// exp_hold_flow_lpm (a single point beyond it, noise, does not end the
// run); it must last exp_hold_min_s, the breath must be that much longer
// than the cycle of the reference settings, and the pressure must rise
// holdMinRiseCmH2O above the pressure before it.
//
// The total PEEP is the mean pressure of the last quarter of the hold,
// leaving out its last holdReleaseS; the second of three equal windows
// over its last three quarters tells whether it has settled. Between units
// of unequal time constants the occluded pressure approaches its static
// value exponentially, with the time constant of the exchange of gas
// between them, (R1 + R2)·C1·C2/(C1 + C2) for two parallel units (derived
// from Otis AB et al., J Appl Physiol 1956;8:427), which is several
// seconds when one unit is slow. When the pressure still rises between the
// last two windows, the value is a lower bound. It is not extrapolated:
// with sensor noise, a limit taken from three windows of a short hold read
// up to a quarter low on our two-unit lungs, where a bound is honest.
func (a *Analyzer) expHold(eeT float64) (holdReading, bool) {
	c := &a.cfg
	s := &a.settings
	if !s.hasRef || !(s.ref.rate > 0) || eeT-a.startT < 60/s.ref.rate+c.ExpHoldMinS {
		return holdReading{}, false
	}
	pts := a.buf.pts[:a.buf.n]
	// The hold may end before the onset of the rise: a pressure rise that
	// starts from PEEP lets gas out of a lung held above it until the
	// airway pressure passes the alveolar one. The last holdReleaseS
	// before the onset are left out of the reading.
	endT := eeT - holdReleaseS
	end := len(pts)
	for end > 0 && pts[end-1].t >= endT {
		end--
	}
	thr := c.ExpHoldFlowLPM / 60
	start := end
	for i := end - 1; i >= 0 && pts[i].t > a.expStartT; i-- {
		if math.Abs(pts[i].f) <= thr {
			start = i
			continue
		}
		if i > 0 && math.Abs(pts[i-1].f) <= thr && pts[i-1].t > a.expStartT {
			continue
		}
		break
	}
	if start == end {
		return holdReading{}, false
	}
	hs := pts[start].t
	h := holdReading{lenS: eeT - hs}
	if h.lenS < c.ExpHoldMinS || endT <= hs {
		return holdReading{}, false
	}
	// The pressure before the hold: the points of the last 0.3 s of flow,
	// leaving out the one beside the valves shutting, whose bin may hold
	// samples of both.
	var pre meanSE
	for i := start - 2; i >= 0 && pts[i].t >= hs-0.3; i-- {
		pre.add(pts[i].p)
	}
	if pre.n == 0 {
		return holdReading{}, false
	}
	h.peepCmH2O = pre.value()
	// Three windows over the last three quarters of the hold.
	var w [3]meanSE
	w0 := hs + (endT-hs)/4
	d := (endT - w0) / 3
	for i := start; i < end; i++ {
		if t := pts[i].t; t >= w0 {
			w[min(int((t-w0)/d), 2)].add(pts[i].p)
		}
	}
	if w[1].n < 2 || w[2].n < 2 {
		return holdReading{}, false
	}
	h.totCmH2O = w[2].value()
	if h.totCmH2O-h.peepCmH2O < holdMinRiseCmH2O {
		return holdReading{}, false
	}
	rise := h.totCmH2O - w[1].value()
	h.unsettled = rise > math.Max(holdSettledCmH2O, 3*math.Hypot(w[1].se(), w[2].se()))
	return h, true
}

// applyHold puts the reading of a hold into the breath: the static
// intrinsic PEEP it read becomes the breath's, no longer a bound, and the
// trapped volume is that pressure times the static compliance of the
// breath's pause, or else the fitted one, which units with unequal time
// constants make lower than the static one. A hold that had not settled
// gives lower bounds, flagged: the pressure at the units' junction rises
// towards the static value and never passes it, which the breath's usual
// estimate may (it read 4.74 cmH2O for a static 3.41 on a 10× lung at
// 25 Hz, where the hold read 3.11).
func (a *Analyzer) applyHold(b *Breath, flags *[]string, m *mechanics, h holdReading) {
	b.ExpHoldS = h.lenS
	b.PEEPiHoldCmH2O = math.Max(0, h.totCmH2O-h.peepCmH2O)
	// The breath's usual estimates read the hold as the end of its
	// expiration (no flow): their disagreement says nothing of the value
	// the hold measured.
	*flags = append(slices.DeleteFunc(*flags, func(f string) bool { return f == FlagPEEPiMismatch }), FlagExpHold)
	cML := b.CStatMLPerCmH2O
	if math.IsNaN(cML) && m.fitOK {
		cML = 1000 / m.e
	}
	b.PEEPiCmH2O = b.PEEPiHoldCmH2O
	if trapped := b.PEEPiHoldCmH2O * cML; !math.IsNaN(trapped) {
		b.TrappedML = trapped
	}
	if h.unsettled {
		*flags = append(*flags, FlagHoldUnsettled)
		if !hasFlag(*flags, FlagPEEPiBound) {
			*flags = append(*flags, FlagPEEPiBound)
		}
		return
	}
	*flags = slices.DeleteFunc(*flags, func(f string) bool { return f == FlagPEEPiBound || f == FlagPEEPiBoundPooled })
}

// meanSE accumulates a mean and its standard error.
type meanSE struct {
	n       int
	sum, ss float64
}

func (m *meanSE) add(x float64) { m.n++; m.sum += x; m.ss += x * x }

func (m *meanSE) value() float64 { return m.sum / float64(m.n) }

// se is the standard error of the mean (0 below two values).
func (m *meanSE) se() float64 {
	if m.n < 2 {
		return 0
	}
	n := float64(m.n)
	v := math.Max(0, (m.ss-m.sum*m.sum/n)/(n-1))
	return math.Sqrt(v / n)
}
