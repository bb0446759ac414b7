package analyze

// edge returns the start time of a flow reversal first seen between the
// previous sample and (t, f), and the volume accrued from the previous sample
// to it. When the previous flow was on the old side of zero the start is the
// interpolated zero crossing; when it was already on the new side (noise
// around zero flow), the start is the previous sample. Detecting the
// reversal at the trigger flow rather than at zero, and then going back to
// the zero crossing, keeps noise around zero flow from moving the start by
// several samples.
func (a *Analyzer) edge(t, f float64) (tc, dv float64) {
	f0 := a.prevF
	if f0 == 0 || (f0 > 0) == (f > 0) {
		return a.prevT, 0
	}
	tc = a.prevT + (t-a.prevT)*f0/(f0-f)
	return tc, 0.5 * f0 * (tc - a.prevT)
}

// track handles a tentative start of inspiration: flow rising above the
// trigger. It returns true when the flow has stayed above the trigger for
// HoldS. While tentative, samples accumulate apart in a.pend; if the flow
// falls back they are merged into the open breath.
func (a *Analyzer) track(t, f, p, dt float64) (confirmed bool) {
	if !a.inCand {
		if a.prevF <= a.trigLPS && f > a.trigLPS {
			tc, dv := a.edge(t, f)
			a.candT = tc
			a.candV = a.vol + dv
			a.pendVol = 0.5*(a.prevF+f)*dt - dv
			a.pend.reset()
			a.pend.add(f, a.pendVol, p)
			a.inCand = true
			a.inHoldT = t
			return a.cfg.HoldS == 0
		}
		if a.ph != phaseWait {
			a.vol += 0.5 * (a.prevF + f) * dt
			a.cur.add(f, a.vol, p)
			a.buf.add(t, f, a.vol, p)
		}
		return false
	}
	a.pendVol += 0.5 * (a.prevF + f) * dt
	if f <= a.trigLPS {
		a.inCand = false
		if a.ph != phaseWait {
			a.cur.merge(&a.pend, a.candV)
			a.vol = a.candV + a.pendVol
			a.cur.add(f, a.vol, p)
			a.buf.add(t, f, a.vol, p)
		}
		return false
	}
	a.pend.add(f, a.pendVol, p)
	if a.ph != phaseWait {
		a.buf.add(t, f, a.candV+a.pendVol, p)
	}
	return t-a.inHoldT >= a.cfg.HoldS
}
