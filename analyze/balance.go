package analyze

import "math"

// Memory and limits of the flow offset and leak estimate.
const (
	// balanceDecay weights past breaths by balanceDecay^age: a memory of
	// about 30 breaths, long enough to average breath-to-breath noise,
	// short enough to follow a sensor that drifts over minutes (our
	// choice).
	balanceDecay = 0.967
	// balanceMinWeight is the weight of breaths needed before a correction
	// is applied (about 10 breaths).
	balanceMinWeight = 8.0
	// balanceMinDecorrelation is the smallest 1 − ρ² between breath
	// duration and ∫Paw dt (uncentred) for which an offset and a leak are
	// told apart; below it the breaths are too alike and the imbalance is
	// read as an offset alone.
	balanceMinDecorrelation = 2e-3
	// maxOffsetLPS and maxLeakLPSPerCmH2O bound the corrections (3 L/min;
	// 0.5 L/min per cmH2O, a leak of about half the tidal volume): beyond
	// them the imbalance is not a sensor matter and nothing is corrected.
	maxOffsetLPS = 3.0 / 60
	// minFlagLPS is the smallest correction (offset plus leak at the mean
	// airway pressure) that flags the breath offset-corrected: 0.3 L/min
	// (our choice, above the 0.25 L/min the trapezoid rule leaves on
	// synchronised 50 Hz signals). Smaller corrections are applied but not
	// flagged, so that a clean sensor's records stay unflagged.
	minFlagLPS         = 0.3 / 60
	maxLeakLPSPerCmH2O = 0.5 / 60
)

// balanceTrapSmoothing is the weight of a breath's trapped-volume
// estimate in the exponentially smoothed estimate whose changes the
// balance takes out (our choice). The raw estimate scatters by about
// ±15 mL from breath to breath, and its difference from one breath to
// the next doubles that in every breath's balance, which is ±25 mL of
// scatter against the few mL a sensor error adds; smoothed, a real change
// of trapped volume still comes out whole, a few breaths later. On the
// acceptance grid (docs/sweep.md) that took the unalarmed air-trapping
// episodes from 12 to 9 and changed no class's R or C error by more
// than 0.2 %.
const balanceTrapSmoothing = 0.3

// balance estimates a constant flow offset b (L/s) and a leak
// conductance k (L/s per cmH2O) between the sensor and the patient from
// the volume balance of many breaths. Over breath i the measured inspired
// minus expired volume is
//
//	VTi − VTe = ΔV_ee + b·Ttot + k·∫Paw dt,
//
// where ΔV_ee is the change of end-expiratory lung volume (zero on
// average; the change of the trapped-volume estimate when known). An
// offset grows with the breath's duration, a leak through a linear orifice
// with its pressure–time integral, so an exponentially weighted least
// squares regression of the balance on [Ttot, ∫Paw dt] over many breaths
// separates the two when the breaths differ enough (a leak follows
// airway pressure, an offset does not; derived). The regression has no
// intercept; its normal equations are kept as decaying sums.
type balance struct {
	stt, sti, sii, std, sid, w float64
}

func (e *balance) reset() { *e = balance{} }

// add accumulates one breath: duration tS, pressure–time integral iCmH2OS
// and raw balance dL (litres, before any correction).
func (e *balance) add(tS, iCmH2OS, dL float64) {
	if !(tS > 0) || math.IsNaN(iCmH2OS) || math.IsNaN(dL) {
		return
	}
	l := balanceDecay
	e.stt = l*e.stt + tS*tS
	e.sti = l*e.sti + tS*iCmH2OS
	e.sii = l*e.sii + iCmH2OS*iCmH2OS
	e.std = l*e.std + tS*dL
	e.sid = l*e.sid + iCmH2OS*dL
	e.w = l*e.w + 1
}

// solve returns the offset (L/s) and the leak conductance (L/s per
// cmH2O), and whether enough breaths were seen. When breath duration and
// ∫Paw are collinear the leak is not identifiable and the imbalance is
// read as an offset (k = 0).
func (e *balance) solve() (b, k float64, ok bool) {
	if e.w < balanceMinWeight || !(e.stt > 0) {
		return 0, 0, false
	}
	det := e.stt*e.sii - e.sti*e.sti
	if e.sii > 0 && det > balanceMinDecorrelation*e.stt*e.sii {
		b = (e.std*e.sii - e.sid*e.sti) / det
		k = (e.sid*e.stt - e.std*e.sti) / det
		if k >= 0 && k <= maxLeakLPSPerCmH2O && math.Abs(b) <= maxOffsetLPS {
			return b, k, true
		}
	}
	b = e.std / e.stt
	if math.Abs(b) > maxOffsetLPS {
		return 0, 0, false
	}
	return b, 0, true
}

// updateBalance feeds the finished breath to the offset and leak
// estimate and sets the correction for the breaths to come. The balance
// is taken back to raw (uncorrected) volumes, and the change of
// end-expiratory lung volume, which is real volume kept in the lung, is
// taken out of it (see eelvChangeL). A breath too small to weigh is one
// whose inspired volume as the sensor read it (corrLPS, the correction
// taken off its inspiration, put back) is under min_breath_volume_ml, not
// one the correction made small: an estimate gone wrong would otherwise
// make every breath "short" and never be fed again (a leak of 10 % with
// tidal volumes of 80 mL at R 120 under pressure control held an offset
// of −2.5 L/min and a leak of 0.36 L/min per cmH2O, against 0 and 0.1, for
// 90 s, until the breaths grew again).
func (a *Analyzer) updateBalance(b *Breath, corrLPS float64) {
	tS := a.candT - a.crossStartT
	if b.HasFlag(FlagArtifact) || b.VtiML+1000*corrLPS*b.TiS < a.cfg.MinBreathVolumeML || !(tS > 0) || a.cur.n == 0 {
		a.prevTrapML, a.prevPEEP = math.NaN(), math.NaN()
		return
	}
	iP := a.cur.p / a.cur.n * tS
	trap := b.TrappedML
	if !math.IsNaN(a.prevTrapML) && !math.IsNaN(trap) {
		trap = a.prevTrapML + balanceTrapSmoothing*(trap-a.prevTrapML)
	}
	d := a.candV + a.offB*tS + a.leakK*iP - a.eelvChangeL(b, trap)
	a.prevTrapML, a.prevPEEP = trap, b.PEEPCmH2O
	a.bal.add(tS, iP, d)
	if off, k, ok := a.bal.solve(); ok {
		a.offB, a.leakK = off, k
		a.meanP = a.cur.p / a.cur.n
	}
}

// eelvChangeL is the change of end-expiratory lung volume over breath b
// (litres) as far as the estimates tell it. Above the relaxation volume
// the lung holds C·(PEEP + PEEPi) at the end of expiration (linear
// compliance; derived), so the volume kept by one breath is the change of
// the trapped-volume estimate (C·PEEPi) plus C times the change of the
// end-expiratory pressure. Without the second term a change of set PEEP
// reads as a sensor error: a step from 5 to 7 cmH2O on a clean linear lung
// of 50 mL/cmH2O keeps 100 mL, which the balance took for an offset of up
// to 2.3 L/min and a leak of up to 0.24 L/min per cmH2O, fading over the
// 30 breaths of its memory (TestBalancePEEPStep). The pressure
// differences of successive breaths nearly telescope in the slowly
// decaying sums of the regression, so the scatter of the end-expiratory
// pressure enters about once, not once a breath. C is the breath's fitted
// compliance, which misses the share of units much slower than the breath
// (docs/analysis.md); a term whose parts are unknown is left out.
func (a *Analyzer) eelvChangeL(b *Breath, trapML float64) float64 {
	dL := 0.0
	if !math.IsNaN(a.prevTrapML) && !math.IsNaN(trapML) {
		dL += (trapML - a.prevTrapML) / 1000
	}
	if dp := b.PEEPCmH2O - a.prevPEEP; !math.IsNaN(dp) && b.CMLPerCmH2O > 0 {
		dL += b.CMLPerCmH2O / 1000 * dp
	}
	return dL
}
