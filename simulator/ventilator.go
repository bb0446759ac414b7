package simulator

// phase is one part of a breath during which the ventilator imposes either
// the flow (volume control inspiration, pause) or the airway pressure
// (pressure control inspiration, expiration through the PEEP valve), as a
// linear function of time: drive(t) = a + b·(t − startS).
type phase struct {
	startS, endS float64
	insp         bool // part of inspiration (flow or pause)
	flowDriven   bool // drive is a flow in L/s; otherwise a pressure in cmH2O
	a, b         float64
}

// drive is the imposed flow or pressure at time t.
func (ph *phase) drive(t float64) float64 { return ph.a + ph.b*(t-ph.startS) }

// plan lays out the phases of a breath starting at t0 with settings v. The
// expiration ends with the next mandatory breath unless the patient
// triggers one earlier.
func plan(v Ventilator, t0 float64, dst []phase) []phase {
	dst = dst[:0]
	period := 60 / v.RateBPM
	ti := inspTimeS(v)
	tEnd := t0 + period
	switch v.Mode {
	case ModePC:
		rise := v.RiseTimeS
		top := v.PEEPCmH2O + v.InspPressureCmH2O
		if rise > 0 {
			dst = append(dst, phase{startS: t0, endS: t0 + rise, insp: true, a: v.PEEPCmH2O, b: v.InspPressureCmH2O / rise})
		}
		dst = append(dst, phase{startS: t0 + rise, endS: t0 + ti, insp: true, a: top})
	default:
		peak, tf := inspFlow(v)
		ph := phase{startS: t0, endS: t0 + tf, insp: true, flowDriven: true, a: peak}
		if v.FlowPattern == FlowDecelerating {
			ph.b = -peak * (1 - decelEnd(v)) / tf
		}
		dst = append(dst, ph)
		if v.PauseS > 0 {
			dst = append(dst, phase{startS: t0 + tf, endS: t0 + ti, insp: true, flowDriven: true})
		}
	}
	return append(dst, phase{startS: t0 + ti, endS: tEnd, a: v.PEEPCmH2O})
}
