package simulator

import "math"

// lung is a patient model with its coefficients latched for one breath, in
// internal units: cmH2O, L, L/s, L/cmH2O.
//
// The state is the volume of each compartment above its relaxation volume
// at zero airway pressure, so its elastic recoil is V/C. The models:
//
//   - single: Paw = K1·V' + K2·V'·|V'| + V/C − Pmus, with separate
//     expiratory K1 and K2 (Rohrer 1915; linear when K2 is zero).
//   - two-compartment: Paw − R0·(V1'+V2') = Ri·Vi' + Vi/Ci − Pmus for each
//     unit i (parallel units after Otis et al. 1956).
//
// Pmus is the inspiratory muscle pressure (positive draws air in). An
// expiratory flow limit caps |V'| during expiration.
type lung struct {
	two        bool
	k1, k2     float64 // inspiratory Rohrer coefficients (single)
	k1e, k2e   float64 // expiratory Rohrer coefficients (single)
	r          [2]float64
	c          [2]float64 // compliance of each unit
	r0         float64    // shared airway resistance (two-compartment)
	peep       float64    // set PEEP, for the relaxation volume of the flow cap
	capOn      bool       // expiratory flow limitation present
	capLPS     float64    // expiratory flow cap at relaxation
	capSlope   float64    // rise of the cap per litre above relaxation
	effortAmp  float64    // peak muscle pressure; zero: passive
	effortPerS float64    // effort period
	effortTS   float64    // effort duration
	effortT0   float64    // first effort onset
}

// newLung latches the patient's coefficients for a breath.
func newLung(p Patient, peep float64) lung {
	l := lung{
		two:  p.Model == ModelTwoCompartment,
		k1:   p.ResistanceCmH2OSPerL,
		k2:   p.K2CmH2OS2PerL2,
		k1e:  p.expResistance(),
		k2e:  p.expK2(),
		peep: peep,
	}
	l.r[0], l.c[0] = p.ResistanceCmH2OSPerL, p.ComplianceMLPerCmH2O/1000
	if l.two {
		l.r[1], l.c[1] = p.Resistance2CmH2OSPerL, p.Compliance2MLPerCmH2O/1000
		l.r0 = p.AirwayResistanceCmH2OSPerL
	}
	if p.FlowLimitLPS > 0 || p.FlowLimitSlopePerS > 0 {
		l.capOn, l.capLPS, l.capSlope = true, p.FlowLimitLPS, p.FlowLimitSlopePerS
	}
	return l
}

// setEffort latches the muscle-pressure waveform; rateBPM is the patient's
// own rate.
func (l *lung) setEffort(p Patient, ventRateBPM float64) {
	if p.EffortCmH2O <= 0 {
		return
	}
	rate := p.EffortRateBPM
	if rate == 0 {
		rate = ventRateBPM
	}
	l.effortAmp = p.EffortCmH2O
	l.effortPerS = 60 / rate
	l.effortTS = p.EffortTimeS
	if l.effortTS == 0 {
		l.effortTS = 0.8
	}
	l.effortTS = math.Min(l.effortTS, l.effortPerS)
	l.effortT0 = p.EffortOffsetS
}

// linear reports whether the model is linear and passive, so that a phase
// can be stepped exactly with exponentials.
func (l *lung) linear() bool {
	return !l.two && l.k2 == 0 && l.k2e == 0 && l.k1e == l.k1 && !l.capOn && l.effortAmp == 0
}

// shortestTauS is the shortest time constant of the model, which sets the
// Runge–Kutta step: K1·C for the single compartment (the Rohrer term only
// lengthens it), and the fast time constant of the two compartments.
func (l *lung) shortestTauS() float64 {
	if !l.two {
		return math.Min(l.k1, l.k1e) * l.c[0]
	}
	fast, _ := l.expTimeConstants()
	// During volume-controlled inspiration the units exchange volume
	// through their own resistances only.
	return math.Min(fast, math.Min(l.r[0]*l.c[0], l.r[1]*l.c[1]))
}

// compliance is the total compliance (L/cmH2O).
func (l *lung) compliance() float64 { return l.c[0] + l.c[1] }

// pmus is the muscle pressure at time t: a half-sine of amplitude
// effortAmp and duration effortTS, repeating every effortPerS.
func (l *lung) pmus(t float64) float64 {
	if l.effortAmp == 0 || t < l.effortT0 {
		return 0
	}
	// Floor, not math.Mod: Mod loops over the bits of the quotient and
	// dominated the run time of long simulations.
	s := t - l.effortT0
	s -= math.Floor(s/l.effortPerS) * l.effortPerS
	if s >= l.effortTS {
		return 0
	}
	return l.effortAmp * math.Sin(math.Pi*s/l.effortTS)
}

// flowCap is the expiratory flow limit (magnitude, L/s) at volume vol, or
// +Inf when there is none.
func (l *lung) flowCap(vol float64) float64 {
	if !l.capOn {
		return math.Inf(1)
	}
	return math.Max(0, l.capLPS+l.capSlope*(vol-l.compliance()*l.peep))
}

// rohrer returns the flow through a Rohrer resistance K1·V' + K2·V'|V'|
// for a pressure drop d, choosing the expiratory coefficients for d < 0.
// The root is written 2|d|/(K1 + √(K1² + 4·K2·|d|)) so that it stays
// accurate as K2 → 0.
func (l *lung) rohrer(d float64) float64 {
	k1, k2 := l.k1, l.k2
	if d < 0 {
		k1, k2 = l.k1e, l.k2e
	}
	a := math.Abs(d)
	f := 2 * a / (k1 + math.Sqrt(k1*k1+4*k2*a))
	if d < 0 {
		return -f
	}
	return f
}

// drop is the resistive pressure drop of the single model at flow f.
func (l *lung) drop(f float64) float64 {
	if f >= 0 {
		return l.k1*f + l.k2*f*f
	}
	return l.k1e*f - l.k2e*f*f
}

// eval returns the airway pressure and flow at time t for state v under
// phase ph, and writes the volume derivatives into dv.
func (l *lung) eval(ph *phase, t float64, v *[2]float64, dv *[2]float64) (pawCmH2O, flowLPS float64) {
	pm := l.pmus(t)
	drive := ph.drive(t)
	if !l.two {
		palv := v[0]/l.c[0] - pm
		if ph.flowDriven {
			dv[0], dv[1] = drive, 0
			return palv + l.drop(drive), drive
		}
		f := l.rohrer(drive - palv)
		if f < 0 {
			f = math.Max(f, -l.flowCap(v[0]))
		}
		dv[0], dv[1] = f, 0
		return drive, f
	}
	// Two compartments: solve for the pressure Pm at the junction of the
	// units behind the shared resistance R0.
	g0, g1 := 1/l.r[0], 1/l.r[1]
	p0, p1 := v[0]/l.c[0]-pm, v[1]/l.c[1]-pm
	var f, pmid float64
	if ph.flowDriven {
		f = drive
		pmid = (f + p0*g0 + p1*g1) / (g0 + g1)
	} else {
		pmid = (drive + l.r0*(p0*g0+p1*g1)) / (1 + l.r0*(g0+g1))
		f = (pmid-p0)*g0 + (pmid-p1)*g1
		if lim := l.flowCap(v[0] + v[1]); f < -lim {
			f = -lim
			pmid = (f + p0*g0 + p1*g1) / (g0 + g1)
		}
	}
	dv[0], dv[1] = (pmid-p0)*g0, (pmid-p1)*g1
	if ph.flowDriven {
		return pmid + l.r0*f, f
	}
	return drive, f
}

// exactStep advances the linear passive single-compartment model from t0 to
// t1 within phase ph exactly: a flow-driven phase integrates the flow ramp,
// a pressure-driven phase solves V' = (C·Paw(t) − V)/τ for a pressure that
// is linear in time.
func (l *lung) exactStep(ph *phase, t0, t1 float64, v *[2]float64) {
	if ph.flowDriven {
		s0, s1 := t0-ph.startS, t1-ph.startS
		v[0] += ph.a*(s1-s0) + ph.b*(s1*s1-s0*s0)/2
		return
	}
	c, tau := l.c[0], l.k1*l.c[0]
	u := t1 - t0
	p0 := ph.drive(t0)
	cb := c * ph.b
	v[0] = c*p0 + cb*(u-tau) + (v[0]-c*p0+cb*tau)*math.Exp(-u/tau)
}

// peakInFlowPhase returns the highest airway pressure of the linear model
// strictly inside (t0, t1) of a flow-driven phase, where the volume rises
// while a decelerating flow falls, or -Inf when the maximum is at an end.
func (l *lung) peakInFlowPhase(ph *phase, t0, t1 float64, v0 float64) float64 {
	if !ph.flowDriven || ph.b == 0 {
		return math.Inf(-1)
	}
	// Paw(s) = V(s)/C + R·(a + b·s): dPaw/ds = (a + b·s)/C + R·b = 0.
	s := -l.k1*l.c[0] - ph.a/ph.b
	t := ph.startS + s
	if t <= t0 || t >= t1 {
		return math.Inf(-1)
	}
	s0 := t0 - ph.startS
	vol := v0 + ph.a*(s-s0) + ph.b*(s*s-s0*s0)/2
	return vol/l.c[0] + l.k1*ph.drive(t)
}
