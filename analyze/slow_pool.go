package analyze

import "math"

// slowMarks are the two marks of a slow end of expiration that one breath
// gives the pool, each relative and with its standard error: flatten,
// 1 − τ/τ_end, how much flatter the flow–volume curve is over the last
// third of the expiration than over its middle (from the slope of the
// last third, whatever its r²), and departure, how far the end-expiratory
// flow lies above the mid-expiration flow–volume line, as a fraction of
// that flow. NaN where they cannot be formed.
type slowMarks struct {
	flatten, flattenSE     float64
	departure, departureSE float64
}

// slowPool keeps the marks of a slow end over the recent breaths that were
// still emptying. Units with unequal time constants make both positive: the
// slow units empty last, so the end of the flow–volume curve is flatter
// than its middle (Lourens MS et al., "Expiratory time constants in
// mechanically ventilated patients with and without COPD", Intensive Care
// Med 2000;26:1612). On one breath of a lung whose time constants differ
// 3–10 times they are a few per cent, inside the noise of one breath, and
// the breath's own test (slowEndRatio, tauDepartureLPS) seldom fires; over
// the recent breaths they show. A single linear compartment gives 0 for
// both, a resistance that grows with flow a faster end (both negative).
// docs/analysis.md, "Slow end over many breaths".
type slowPool struct {
	m       [slowPoolN]slowMarks
	n, next int
	// shown is the last verdict: once the pool has shown a slow end it
	// keeps it on weaker evidence (slowPoolZKeep, slowPoolKeepFloor), and
	// while it holds too few weighable marks to judge.
	shown bool
}

// slowPoolN is how many breaths the pool keeps and slowPoolMin how many
// weighable marks of a kind it needs before that kind speaks. The end is
// slow when the inverse-variance mean of either mark over the kept breaths
// (Hedges LV, Olkin I, "Statistical Methods for Meta-Analysis", 1985) is
// at least its floor (slowPoolFlatten, slowPoolDeparture) and slowPoolZ of
// its standard errors. Breaths under slowPoolMinPEEPiCmH2O neither enter
// the pool nor are flagged from it: their end-expiratory flow is too small
// for the marks to mean anything, and a bound under it is not worth
// stating. Our choices, set on the acceptance grid (docs/sweep.md): the
// pooled flag fell there on 2.5 % of the breaths of single linear
// compartments and 13 of 77 460 of Rohrer lungs before the hysteresis
// below. Thirty breaths rather than fifteen (3 December 2026): at 25 and
// 50 Hz a breath's marks weigh little, and the 10× lung lost the verdict
// when a higher resistance or rate hid more of its slow end; with thirty
// the acceptance grid's R 60 class went from 0.9495 to 0.956 within
// ±1 cmH2O or an honest bound, at the cost of single compartments flagged
// on 6.1 % of their breaths instead of 5.5 % (default grid, noisy sensor:
// 11.1 % instead of 8.2 %). Longer was not kept: a noisy sensor's offset
// estimate wanders over tens of breaths and moves both marks with it, so
// more breaths do not average that error away (docs/sweep.md, "A longer
// pool").
const (
	slowPoolN             = 30
	slowPoolMin           = 8
	slowPoolFlatten       = 0.03
	slowPoolDeparture     = 0.02
	slowPoolZ             = 3
	slowPoolMinPEEPiCmH2O = 1.0
)

// slowPoolZKeep and slowPoolKeepFloor are the hysteresis of the verdict
// (our choice, set on the acceptance grid, docs/sweep.md): a slow end once
// shown stays while either mark's mean is at least slowPoolKeepFloor of
// its floor and slowPoolZKeep of its standard errors, and while the pool
// has too few weighable marks of either kind to say anything. Units with
// unequal time constants do not go away when the marks weaken: a shorter
// expiration (a higher rate) or a higher resistance shows less of the
// slow end on every breath, and breaths whose time constants cannot be
// measured give no marks at all. Without it, a lung of two units whose
// time constants differ 3 times lost the flag on 26 of 63 breaths after
// its rate went from 20 to 26 /min (TestSlowEndPooledAcrossRateChange).
// The cost is more single compartments flagged peepi-bound (on their own
// or from the pool): on the acceptance grid 4.9 % of their breaths instead
// of 3.0 %, on the default grid 7.7 % instead of 3.1 %, and 149 instead of
// 30 of 77 460 breaths of Rohrer lungs.
const (
	slowPoolZKeep     = 1.5
	slowPoolKeepFloor = 0.5
)

// add keeps the marks of one breath.
func (p *slowPool) add(m slowMarks) {
	p.m[p.next] = m
	p.next = (p.next + 1) % slowPoolN
	if p.n < slowPoolN {
		p.n++
	}
}

// slow reports whether the kept breaths say the end of expiration is
// slower than its middle, with the hysteresis of slowPoolZKeep.
func (p *slowPool) slow() bool {
	var fl, dep weighedMean
	for i := range p.n {
		m := &p.m[i]
		fl.add(m.flatten, m.flattenSE)
		dep.add(m.departure, m.departureSE)
	}
	if fl.k < slowPoolMin && dep.k < slowPoolMin {
		return p.shown // nothing to judge by: the last verdict stands
	}
	z, floor := float64(slowPoolZ), 1.0
	if p.shown {
		z, floor = slowPoolZKeep, slowPoolKeepFloor
	}
	p.shown = fl.shows(floor*slowPoolFlatten, z) || dep.shows(floor*slowPoolDeparture, z)
	return p.shown
}

// weighedMean accumulates an inverse-variance weighted mean.
type weighedMean struct {
	sw, swx float64
	k       int
}

// add weighs x by 1/se²; a non-finite x or a standard error that is not
// positive and finite is left out.
func (w *weighedMean) add(x, se float64) {
	v := 1 / (se * se)
	if math.IsNaN(x) || math.IsInf(x, 0) || !(v > 0) || math.IsInf(v, 0) {
		return
	}
	w.sw += v
	w.swx += v * x
	w.k++
}

// shows reports whether the mean of at least slowPoolMin values is at
// least floor and z of its standard errors (1/√Σw).
func (w *weighedMean) shows(floor, z float64) bool {
	if w.k < slowPoolMin {
		return false
	}
	mean := w.swx / w.sw
	return mean >= floor && mean*math.Sqrt(w.sw) >= z
}
