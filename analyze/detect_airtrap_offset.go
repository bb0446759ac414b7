package analyze

import "math"

// offsetShare returns the factor that takes out of a slow-end bound
// (flag peepi-bound) the part an expiratory flow offset not yet removed
// would explain, 1 when there is none. Before the analyzer's offset and
// leak estimate is ready (no correction applied to b), a constant
// expiratory offset c makes a breath expire c·Ttot more than it received
// and adds c to the end-expiratory flow, which is what a slow compartment
// still emptying looks like; the end-expiratory-flow route scales with
// that flow (trapped volume τ·|EEF|), so the bound is scaled by
// (|EEF| − c)/|EEF|, c read from the breath's own volume balance (mass
// balance; derived). A lung that truly loses volume in its first breaths
// is read low for those breaths, the safer error while the flow is not
// yet trustworthy.
func offsetShare(b *Breath) float64 {
	if !slowEndBound(b) || b.FlowOffsetLPM != 0 || b.LeakLPMPerCmH2O != 0 {
		return 1
	}
	lostL, tS, eef := (b.VteML-b.VtiML)/1000, b.TiS+b.TeS, b.EndExpFlowLPM
	if !(lostL > 0 && tS > 0 && eef > 0) {
		return 1
	}
	return math.Max(0, 1-60*lostL/tS/eef)
}

// inflowShare returns the factor that gives back to the end-expiratory
// estimates of an unbounded breath what an inspiratory flow offset (or a
// leak) not yet removed takes from them, 1 when there is none: the mirror
// of offsetShare. Before the analyzer's offset and leak estimate is ready,
// an offset c toward the patient makes a breath receive c·Ttot more than it
// expires and takes c off the end-expiratory flow e, so that intrinsic
// PEEP by the end-expiratory-flow route reads (e − c)/e of the truth (mass
// balance; derived). c is read from the breath's own balance, and with the
// measured |EEF| = e − c the estimates are scaled by (|EEF| + c)/|EEF|,
// only when |EEF| is at least c: a flow that small cannot be told from the
// offset itself, and a lung that does not trap air is not raised by it. A
// lung truly building up volume in its first breaths reads higher, which
// the build-up rule does anyway; a leak, whose loss is spread over the
// breath while only its end-expiratory part lowers |EEF|, reads a little
// high while the estimate is not ready.
func inflowShare(b *Breath) float64 {
	if slowEndBound(b) || b.FlowOffsetLPM != 0 || b.LeakLPMPerCmH2O != 0 {
		return 1
	}
	keptL, tS, eef := (b.VtiML-b.VteML)/1000, b.TiS+b.TeS, b.EndExpFlowLPM
	if !(keptL > 0 && tS > 0 && eef > 0) {
		return 1
	}
	c := 60 * keptL / tS
	if eef < c {
		return 1
	}
	return (eef + c) / eef
}

// boundMagnitude returns the intrinsic PEEP the detector reads for a breath
// whose figures are a slow-end bound (flag peepi-bound, from its own
// expiration or from the recent breaths): its trapped-volume
// bound over the single-compartment compliance, or the fit route when that
// is larger; NaN when it cannot be formed (the record's own figure is then
// used). The record carries a lower bound that needs no compliance
// (reportTrapping), honest but about a fifth lower in the median on
// two-unit lungs; this figure, which the record gave before 2 December
// 2026, is what the detector's threshold was set on (docs/detectors.md):
// the dynamic compliance of a two-unit lung is low, which makes up in the
// median for a trapped volume read from below, at the price of
// overstating on some breaths.
func boundMagnitude(b *Breath) float64 {
	if !b.HasFlag(FlagPEEPiBound) || !(b.CMLPerCmH2O > 0) || math.IsNaN(b.TrappedML) {
		return math.NaN()
	}
	return math.Max(b.TrappedML/b.CMLPerCmH2O, nanTo0(b.PEEPiFitCmH2O))
}

// slowEndBound reports whether the breath's own expiration made its
// figures a slow-end bound (flag peepi-bound without peepi-bound-pooled).
// A breath flagged from the recent breaths keeps the intrinsic PEEP it
// would have had unflagged, so the offset and inflow shares and the
// plateau estimate treat it as unflagged, as before the pooled flag
// existed (3 December 2026); only boundMagnitude reads it as a bound.
func slowEndBound(b *Breath) bool {
	return b.HasFlag(FlagPEEPiBound) && !b.HasFlag(FlagPEEPiBoundPooled)
}
