package analyze

import "math"

// slowPool keeps two marks of a slow end of expiration over the recent
// breaths that were still emptying: the ratio of the end-expiratory to the
// mid-expiratory time constant (TauEndS/TauS), and the departure of the
// end-expiratory flow above the mid-expiration flow–volume line, relative
// to that flow, with its standard error. Units with unequal time constants
// make the ratio above 1 and the departure positive: the slow units empty
// last, so the end of the flow–volume curve is flatter than its middle
// (Lourens MS et al., "Expiratory time constants in mechanically
// ventilated patients with and without COPD", Intensive Care Med
// 2000;26:1612). On one breath of a lung whose time constants differ 3–10
// times they are a few per cent, inside the noise of one breath, and the
// breath's own test (slowEndRatio, tauDepartureLPS) seldom fires; over the
// recent breaths they show. A single linear compartment gives a ratio of 1
// and a departure of 0, a resistance that grows with flow a faster end
// (ratio under 1, departure negative). docs/analysis.md, "Slow end over
// many breaths".
type slowPool struct {
	ratio, dep, depW [slowPoolN]float64
	n, next          int
}

// slowPoolN is how many breaths the pool keeps and slowPoolMin how many
// it needs before it speaks. The end is slow when the median ratio is at
// least slowPoolRatio, or when the inverse-variance mean of the departures
// (Hedges LV, Olkin I, "Statistical Methods for Meta-Analysis", 1985) is at
// least slowPoolDeparture and slowPoolZ of its standard errors. Breaths
// under slowPoolMinPEEPiCmH2O neither enter the pool nor are flagged from
// it: their end-expiratory flow is too small for the marks to mean
// anything, and a bound under it is not worth stating. Our choices, set on
// the acceptance grid (docs/sweep.md): they flag 2.4 % of the breaths of
// single linear compartments and under 0.1 % of those of Rohrer lungs.
const (
	slowPoolN             = 15
	slowPoolMin           = 8
	slowPoolRatio         = 1.045
	slowPoolDeparture     = 0.02
	slowPoolZ             = 3
	slowPoolMinPEEPiCmH2O = 1.0
)

// add keeps the marks of one breath; a NaN mark is skipped by the pool.
func (p *slowPool) add(tauRatio, departure, departureSE float64) {
	p.ratio[p.next], p.dep[p.next], p.depW[p.next] = tauRatio, departure, 1/(departureSE*departureSE)
	p.next = (p.next + 1) % slowPoolN
	if p.n < slowPoolN {
		p.n++
	}
}

// slow reports whether the kept breaths say the end of expiration is
// slower than its middle.
func (p *slowPool) slow() bool {
	if poolMedian(p.ratio[:p.n]) >= slowPoolRatio {
		return true
	}
	var sw, swd float64
	k := 0
	for i := range p.n {
		d, w := p.dep[i], p.depW[i]
		if math.IsNaN(d) || math.IsInf(d, 0) || !(w > 0) || math.IsInf(w, 0) {
			continue
		}
		sw += w
		swd += w * d
		k++
	}
	if k < slowPoolMin {
		return false
	}
	mean := swd / sw
	return mean >= slowPoolDeparture && mean*math.Sqrt(sw) >= slowPoolZ
}

// poolMedian returns the median of the finite values of v (at most
// slowPoolN of them), NaN when fewer than slowPoolMin are finite. It sorts
// a copy on the stack: no allocation.
func poolMedian(v []float64) float64 {
	var s [slowPoolN]float64
	k := 0
	for _, x := range v {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			continue
		}
		j := k
		for ; j > 0 && s[j-1] > x; j-- {
			s[j] = s[j-1]
		}
		s[j] = x
		k++
	}
	if k < slowPoolMin {
		return math.NaN()
	}
	if k%2 == 1 {
		return s[k/2]
	}
	return (s[k/2-1] + s[k/2]) / 2
}
