package simulator

import (
	"fmt"
	"math"

	"trapline/ingest"
)

// Sim runs one scenario. It is a pull-driven state machine: every call to
// Next computes the next sample, so a caller runs it as fast or as slowly as
// it likes and needs no goroutine. A Sim is not safe for concurrent use.
type Sim struct {
	sc      Scenario
	tl      *timeline
	periodS float64
	nTotal  int64   // sample slots in the scenario
	k       int64   // next sample slot
	stepS   float64 // fixed Runge–Kutta step, or 0 for automatic

	breathStepS float64 // Runge–Kutta step of the breath in progress

	set   params // settings latched by the breath in progress
	lung  lung
	exact bool
	// numeric forces the Runge–Kutta path even for the linear model, so
	// that tests can check the integrator against the closed forms.
	numeric bool
	phases  []phase
	iph     int
	t       float64    // physics time
	v       [2]float64 // compartment volumes above zero-pressure relaxation, L
	acc     accum
	trig    bool // the patient triggered the next breath
	// nextHold is the index of the first expiratory hold of the timeline
	// not yet performed.
	nextHold int

	sensor  sensor
	linkUp  bool
	links   []LinkEvent
	truths  []Truth
	emitted int64
}

// LinkEvent is a change of the signal link: the samples stop at a
// disconnection and come back at a reconnection.
type LinkEvent struct {
	// TimeS is the time of the change on the sample clock.
	TimeS float64
	// Up is true for a reconnection.
	Up bool
}

// New validates a scenario and prepares it to run from the relaxed lung:
// every compartment starts at its relaxation volume at the set PEEP, so the
// build-up of trapped volume over the first breaths is visible.
func New(sc Scenario) (*Sim, error) {
	tl, err := compile(&sc)
	if err != nil {
		name := sc.Name
		if name == "" {
			name = "scenario"
		}
		return nil, fmt.Errorf("%s: %w", name, err)
	}
	if sc.Stream == "" {
		sc.Stream = "sim"
	}
	s := &Sim{
		sc:      sc,
		tl:      tl,
		periodS: 1 / sc.SampleRateHz,
		nTotal:  int64(math.Ceil(float64(sc.DurationS)*sc.SampleRateHz - 1e-9)),
		stepS:   sc.StepS,
		sensor:  newSensor(sc.Seed),
		linkUp:  true,
		phases:  make([]phase, 0, 4),
	}
	s.startBreath(0, false)
	p := tl.base
	s.v[0] = p.Patient.ComplianceMLPerCmH2O / 1000 * p.Ventilator.PEEPCmH2O
	if s.lung.two {
		s.v[1] = p.Patient.Compliance2MLPerCmH2O / 1000 * p.Ventilator.PEEPCmH2O
	}
	s.acc.vStart = s.v[0] + s.v[1]
	return s, nil
}

// Scenario returns the scenario being run.
func (s *Sim) Scenario() Scenario { return s.sc }

// Stream is the stream id of the samples.
func (s *Sim) Stream() string { return s.sc.Stream }

// SampleRateHz is the nominal sample rate.
func (s *Sim) SampleRateHz() float64 { return s.sc.SampleRateHz }

// DurationS is the simulated length of the scenario.
func (s *Sim) DurationS() float64 { return float64(s.sc.DurationS) }

// Next returns the next sample that reaches the output, or ok == false at
// the end of the scenario. Samples lost to a disconnection or dropped by the
// sensor are skipped, so their time stamps jump.
func (s *Sim) Next() (smp ingest.Sample, ok bool) {
	for s.k < s.nTotal {
		k := s.k
		s.k++
		cfg := &s.set.Sensor
		t := float64(k)*s.periodS + s.sensor.jitter(cfg, s.periodS)
		if t < 0 {
			t = 0
		}
		s.advanceTo(t)
		cfg = &s.set.Sensor // a new breath may have latched new settings
		var dv [2]float64
		paw, flow := s.lung.eval(&s.phases[s.iph], t, &s.v, &dv)
		drop := s.sensor.dropped(cfg)
		up := !inWindows(s.tl.disconnect, t)
		if up != s.linkUp {
			s.linkUp = up
			s.links = append(s.links, LinkEvent{TimeS: t, Up: up})
		}
		if !up || drop {
			continue
		}
		var art window
		for _, w := range s.tl.artifacts {
			if t >= w.startS && t < w.endS {
				art = w
			}
		}
		p, f := s.sensor.read(cfg, t, paw, flow, art)
		s.emitted++
		return ingest.Sample{TimeS: t, PressureCmH2O: p, FlowLPS: f, VolumeL: ingest.NoVolume}, true
	}
	// Close a breath that ends exactly with the scenario.
	s.advanceTo(float64(s.sc.DurationS))
	return ingest.Sample{}, false
}

// Read fills dst with the next samples and returns how many it wrote; zero
// means the scenario has ended.
func (s *Sim) Read(dst []ingest.Sample) int {
	for i := range dst {
		smp, ok := s.Next()
		if !ok {
			return i
		}
		dst[i] = smp
	}
	return len(dst)
}

// TakeTruth returns the ground truth of the breaths completed since the
// last call, in order. A breath is complete when its expiration ends, so its
// truth is available once Next has returned a sample at or after its end.
func (s *Sim) TakeTruth() []Truth {
	t := s.truths
	s.truths = nil
	return t
}

// TakeLinkEvents returns the link changes since the last call, in order.
// Every change is reported before the first sample that follows it.
func (s *Sim) TakeLinkEvents() []LinkEvent {
	l := s.links
	s.links = nil
	return l
}

// Done reports whether the scenario has ended.
func (s *Sim) Done() bool { return s.k >= s.nTotal }

// Emitted counts the samples returned so far.
func (s *Sim) Emitted() int64 { return s.emitted }

// Run pulls every sample of a scenario and returns them with the ground
// truth of every completed breath. It suits short runs in tests.
func Run(sc Scenario) ([]ingest.Sample, []Truth, error) {
	s, err := New(sc)
	if err != nil {
		return nil, nil, err
	}
	samples := make([]ingest.Sample, 0, s.nTotal)
	for {
		smp, ok := s.Next()
		if !ok {
			break
		}
		samples = append(samples, smp)
	}
	return samples, s.TakeTruth(), nil
}

func inWindows(ws []window, t float64) bool {
	for _, w := range ws {
		if t >= w.startS && t < w.endS {
			return true
		}
	}
	return false
}

// phaseEps absorbs rounding when a sample lands on a phase boundary: such a
// sample belongs to the phase that starts there.
const phaseEps = 1e-9

// advanceTo moves the physics to time t1, crossing phase and breath
// boundaries exactly.
func (s *Sim) advanceTo(t1 float64) {
	for guard := 0; s.t < t1 && guard < 1_000_000; guard++ {
		ph := &s.phases[s.iph]
		if ph.endS-s.t <= phaseEps {
			s.endPhase()
			continue
		}
		end := math.Min(ph.endS, t1)
		if s.integrate(ph, end) {
			ph.endS = s.t // the patient triggered: expiration ends now
			s.trig = true
		}
		if ph.endS-s.t <= phaseEps {
			s.endPhase()
		}
	}
}

// integrate advances the state within phase ph up to t1: exactly for the
// linear passive model, otherwise with fixed-step fourth-order Runge–Kutta.
// It returns true when a patient trigger ended an expiration early, with
// s.t at the trigger.
func (s *Sim) integrate(ph *phase, t1 float64) bool {
	if ph.insp {
		s.trackInsp(ph) // the start of a decelerating ramp may be the peak
	}
	if s.exact {
		if ph.insp {
			if p := s.lung.peakInFlowPhase(ph, s.t, t1, s.v[0]); p > s.acc.pip {
				s.acc.pip = p
			}
		}
		s.lung.exactStep(ph, s.t, t1, &s.v)
		s.t = t1
		if ph.insp {
			s.trackInsp(ph)
		}
		return false
	}
	n := math.Ceil((t1-s.t)/s.breathStepS - 1e-9)
	if n < 1 {
		n = 1
	}
	h := (t1 - s.t) / n
	trig := s.set.Ventilator.TriggerLPM / 60
	lockout := ph.startS + math.Min(0.3, 0.5*(ph.endS-ph.startS))
	for i := 0; i < int(n); i++ {
		s.rk4(ph, h)
		if i == int(n)-1 {
			s.t = t1 // no drift from summing h
		}
		if s.lung.effortAmp > 0 && s.lung.pmus(s.t) > 0 {
			s.acc.effort = true
		}
		if ph.insp {
			s.trackInsp(ph)
		} else if trig > 0 && s.t >= lockout && s.t < ph.endS-phaseEps {
			var dv [2]float64
			if _, f := s.lung.eval(ph, s.t, &s.v, &dv); f > trig {
				return true
			}
		}
	}
	return false
}

// rk4 takes one classical Runge–Kutta step of length h.
func (s *Sim) rk4(ph *phase, h float64) {
	var k1, k2, k3, k4, y [2]float64
	t := s.t
	s.lung.eval(ph, t, &s.v, &k1)
	for i := range 2 {
		y[i] = s.v[i] + h/2*k1[i]
	}
	s.lung.eval(ph, t+h/2, &y, &k2)
	for i := range 2 {
		y[i] = s.v[i] + h/2*k2[i]
	}
	s.lung.eval(ph, t+h/2, &y, &k3)
	for i := range 2 {
		y[i] = s.v[i] + h*k3[i]
	}
	s.lung.eval(ph, t+h, &y, &k4)
	for i := range 2 {
		s.v[i] += h / 6 * (k1[i] + 2*k2[i] + 2*k3[i] + k4[i])
	}
	s.t = t + h
}

// trackInsp records the airway pressure at the current time of an
// inspiratory phase for the true peak pressure.
func (s *Sim) trackInsp(ph *phase) {
	var dv [2]float64
	if p, _ := s.lung.eval(ph, s.t, &s.v, &dv); p > s.acc.pip {
		s.acc.pip = p
	}
}

// endPhase moves to the next phase at s.t, closing the breath after its
// expiration.
func (s *Sim) endPhase() {
	ph := &s.phases[s.iph]
	if ph.insp {
		s.t = ph.endS
		s.iph++
		if !s.phases[s.iph].insp {
			s.acc.vEndInsp = s.v[0] + s.v[1]
			s.acc.endInspS = s.t
		}
		return
	}
	var dv [2]float64
	if s.iph+1 < len(s.phases) {
		// An expiratory hold follows: the flow as the valves shut is the
		// end-expiratory flow. A patient trigger that ended the
		// expiration early moves the hold with it.
		_, s.acc.eefLPS = s.lung.eval(ph, s.t, &s.v, &dv)
		s.t = ph.endS
		s.iph++
		h := &s.phases[s.iph]
		h.endS += s.t - h.startS
		h.startS = s.t
		s.acc.holdS = h.endS - h.startS
		return
	}
	// End of expiration: the flow just before the next breath is the
	// end-expiratory flow (after a hold, the flow as it started).
	_, eef := s.lung.eval(ph, s.t, &s.v, &dv)
	if s.acc.holdS > 0 {
		eef = s.acc.eefLPS
	}
	triggered := s.trig
	s.trig = false
	s.t = ph.endS
	s.truths = append(s.truths, s.acc.finish(s.tl, &s.lung, s.sc.Stream, s.t, s.v[0]+s.v[1], eef))
	s.startBreath(s.t, triggered)
}

// startBreath latches the settings in force at t and lays out the breath.
func (s *Sim) startBreath(t float64, triggered bool) {
	s.set = s.tl.at(t)
	s.lung = newLung(s.set.Patient, s.set.Ventilator.PEEPCmH2O)
	s.lung.setEffort(s.set.Patient, s.set.Ventilator.RateBPM)
	s.exact = s.lung.linear() && !s.numeric
	s.breathStepS = s.stepS
	if s.breathStepS == 0 {
		s.breathStepS = math.Max(MinStepS, math.Min(DefaultStepS, s.lung.shortestTauS()/20))
	}
	s.phases = plan(s.set.Ventilator, t, s.phases)
	if s.nextHold < len(s.tl.holds) {
		// The first expiration that ends at or after a hold's time ends
		// in the hold: both valves shut, no flow.
		exp := s.phases[len(s.phases)-1]
		if h := s.tl.holds[s.nextHold]; h.startS <= exp.endS {
			s.phases = append(s.phases, phase{startS: exp.endS, endS: exp.endS + h.endS - h.startS, flowDriven: true})
			s.nextHold++
		}
	}
	s.iph = 0
	s.t = t
	s.acc = accum{
		seq:       s.acc.seq + 1,
		startS:    t,
		set:       s.set,
		vStart:    s.v[0] + s.v[1],
		pip:       math.Inf(-1),
		triggered: triggered,
	}
	if s.lung.effortAmp > 0 && s.lung.pmus(t) > 0 {
		s.acc.effort = true
	}
}
