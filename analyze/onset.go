package analyze

import "math"

// Limits of the search for the onset of the inspiratory rise.
const (
	// onsetLookbackS is the longest time between the onset of the
	// ventilator's pressure rise and the zero crossing of flow that
	// confirmed the inspiration: a pressure rise of up to 0.4 s crosses
	// the alveolar pressure before its end (common practice for rise
	// times), with a margin.
	onsetLookbackS = 0.6
	// onsetBaseS is the span of expiration, ending at the crossing, whose
	// median airway pressure is the expiratory baseline.
	onsetBaseS = 0.5
	// onsetMinRiseCmH2O is the smallest rise above the baseline that marks
	// the ventilator's action; it must also exceed four times the
	// pressure noise of the baseline.
	onsetMinRiseCmH2O = 0.5
)

// inspOnset returns the onset of the inspiratory rise that led to the flow
// zero crossing at tc: the time of the last sample before tc whose airway
// pressure was still at the expiratory baseline. Under volume control and
// with a pressure step the onset is the crossing itself; under pressure
// control with a rise time the flow is still expiratory for a while after
// the pressure starts to rise, and the end of expiration is the start of
// that rise (the ventilator's action, not the flow). The baseline is the
// median pressure of the late expiration, and the rise must exceed both
// onsetMinRiseCmH2O and four times the baseline's spread (median absolute
// deviation), so noise does not move the onset.
//
// It also returns eeT, the end of the end-expiratory window: the onset
// itself, or, under a pressure rise, the time at which the line through
// the first two samples of the rise meets the baseline, kept between the
// last sample at the baseline and the onset sample. The onset sample is
// the first one at least onsetMinRiseCmH2O above the baseline, so the one
// before it may already be on the rise, with its expiratory flow cut by
// the rising pressure: at 25 Hz and a 0.4 s rise of 15 cmH2O a sample is
// 1.5 cmH2O apart, and that sample in the window read the end-expiratory
// flow and intrinsic PEEP low (docs/analysis.md, "End of expiration").
func (a *Analyzer) inspOnset(tc float64) (onset, eeT float64) {
	from := math.Max(a.expStartT+0.25*(tc-a.expStartT), tc-onsetBaseS)
	if !(tc-from > 0.1) {
		return tc, tc
	}
	var buf [ringSize]float64
	ps := buf[:0]
	below := 0 // samples lower than the last one minus onsetMinRiseCmH2O
	for k := 1; k <= a.ring.n; k++ {
		e := a.ring.at(k)
		if e.t >= tc {
			continue
		}
		if e.t < from {
			break
		}
		ps = append(ps, e.p)
		if e.p < ps[0]-onsetMinRiseCmH2O {
			below++
		}
	}
	// The threshold lies at least onsetMinRiseCmH2O above the median: when
	// no more than half the samples lie below the last one minus that
	// rise, the median is at least that high, the last pressure is not
	// above the threshold, and the onset is the crossing (a pressure step,
	// volume control). A count costs less than the medians.
	if len(ps) < 5 || below <= len(ps)/2 {
		return tc, tc
	}
	// Medians by selection (linear time), not sorting: this runs once a
	// breath but on up to a second of samples.
	base := detSelect(ps, len(ps)/2)
	for i := range ps {
		ps[i] = math.Abs(ps[i] - base)
	}
	thr := base + math.Max(onsetMinRiseCmH2O, 4*1.4826*detSelect(ps, len(ps)/2))
	// Walk back from the crossing while the pressure is above the
	// threshold: the rise. r1 and r2 are its first two samples (r2 the
	// first at or after the crossing when the rise has one sample before
	// it), pre the last one before it.
	onset = tc
	var r1, r2, pre *rawSample
	for k := 1; k <= a.ring.n; k++ {
		e := a.ring.at(k)
		if e.t >= tc {
			r2 = e
			continue
		}
		if e.t < tc-onsetLookbackS || e.p <= thr {
			pre = e
			break
		}
		onset = e.t
		if r1 != nil {
			r2 = r1
		}
		r1 = e
	}
	eeT = onset
	if r1 != nil && r2 != nil && pre != nil && r2.t > r1.t && r2.p > r1.p {
		t0 := r1.t - (r1.p-base)*(r2.t-r1.t)/(r2.p-r1.p)
		eeT = math.Min(r1.t, math.Max(pre.t, t0))
	}
	return onset, eeT
}
