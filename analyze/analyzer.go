package analyze

import (
	"math"

	"trapline/ingest"
)

// Flags that a breath record may carry, each naming why a value may be
// unreliable or what was found.
const (
	// FlagPause: an end-inspiratory pause was found; the plateau and the
	// occlusion-method values are present.
	FlagPause = "pause"
	// FlagNoPause: no end-inspiratory pause; plateau and occlusion values are null.
	FlagNoPause = "no-pause"
	// FlagEffort: the breath was not passive (the inspiratory pressure
	// departs from the passive model, or the fit gives a negative
	// elastance); its mechanics are not trend-worthy.
	FlagEffort = "effort"
	// FlagShort: inspired volume below the minimum breath volume.
	FlagShort = "short"
	// FlagArtifact: non-finite samples were dropped inside the breath.
	FlagArtifact = "artifact"
	// FlagLeak: expired volume falls short of inspired volume.
	FlagLeak = "leak"
	// FlagFitSingular: flow and volume were collinear or constant; the
	// equation of motion could not be solved and R, C, P0 are null.
	FlagFitSingular = "fit-singular"
	// FlagFitImplausible: the fit gave a non-physical or out-of-range R or C,
	// or too low an r²; R, C, P0 are null.
	FlagFitImplausible = "fit-implausible"
	// FlagFlowReversed: pressure falls with inflow and volume (both fitted R
	// and E negative): the flow sign of the input is probably reversed.
	FlagFlowReversed = "flow-reversed"
	// FlagTauUnreliable: the expiratory flow–volume curve gave no usable
	// time constant.
	FlagTauUnreliable = "tau-unreliable"
	// FlagTauNonlinear: the end of expiration departs from the single time
	// constant of its middle (slower: unequal time constants, and trapped
	// volume and intrinsic PEEP are then underestimated; faster: a
	// resistance that grows with flow). τ-based values are unreliable.
	FlagTauNonlinear = "tau-nonlinear"
	// FlagPEEPiMismatch: the two intrinsic PEEP estimates disagree beyond
	// the configured tolerance (flow limitation, heterogeneity or effort).
	FlagPEEPiMismatch = "peepi-mismatch"
	// FlagPEEPiBound: the end of expiration is slower than a single time
	// constant (units with unequal time constants); the trapped volume and
	// intrinsic PEEP are lower bounds, never zero when the flow says there
	// is trapping.
	FlagPEEPiBound = "peepi-bound"
	// FlagRohrer: the residuals of the linear fit grow with flow; the
	// resistance was fitted as K1 + K2·|V'| (Rohrer 1915) and intrinsic
	// PEEP uses the resistance at the end-expiratory flow.
	FlagRohrer = "rohrer"
	// FlagRohrerPooled: with rohrer, K2 comes from the recent breaths
	// (their pooled K2 over their resistance, times this breath's), which
	// this breath alone did not determine but does not contradict; K1, E
	// and P0 are this breath's.
	FlagRohrerPooled = "rohrer-pooled"
	// FlagPEEPiBoundPooled: with peepi-bound, the slow end shows on the
	// recent breaths taken together (slowPool), not on this one alone; the
	// intrinsic PEEP is this breath's usual estimate, which units with
	// unequal time constants make read low, and the trapped volume at
	// least the end-expiratory flow times the end-expiratory time constant.
	FlagPEEPiBoundPooled = "peepi-bound-pooled"
	// FlagOffsetCorrected: the volumes and mechanics were corrected for a
	// flow offset and a pressure-proportional leak estimated over many
	// breaths (flow_offset_lpm and leak_lpm_per_cmh2o of the record) of at
	// least 0.3 L/min at the mean airway pressure.
	FlagOffsetCorrected = "offset-corrected"
	// FlagSettingsChanged: the ventilator settings inferred from the
	// waveform differ from those of the previous breaths.
	FlagSettingsChanged = "settings-changed"
)

// phase is the segmentation state.
type phase uint8

const (
	phaseWait phase = iota // no breath open: waiting for an inspiration
	phaseInsp              // inspiration, including an end-inspiratory pause
	phaseExp               // expiration, including an end-expiratory pause
)

// flowSmoothS is the time constant of the exponential smoothing applied to
// flow for pause detection only; segmentation and volumes use raw flow.
const flowSmoothS = 0.01

// Analyzer segments one stream into breaths and computes the breath record.
// It is a streaming state machine: Push does O(1) amortised work and keeps
// bounded memory (a 1024-sample ring and a 256-point decimated breath), and
// allocates only when a breath completes. It is not safe for concurrent use.
//
// Segmentation follows common practice (flow reversals with hysteresis: the
// flow must pass TriggerFlowLPM in the new direction and stay beyond it for
// HoldS; phases at least MinPhaseS long). The start of a breath is the
// interpolated zero crossing of flow just before the confirmed inspiration,
// so an expiratory flow still present at that moment (the waveform sign of
// intrinsic PEEP; Nguyen, Pastor, L'Her, BioMed Eng OnLine 2012) is measured,
// not smoothed away.
type Analyzer struct {
	stream string
	cfg    Config

	trigLPS      float64 // trigger flow of the next phase change (see scaledTrigger)
	trigMinLPS   float64
	trigMaxLPS   float64
	pauseFlowLPS float64
	seq          int

	ph       phase
	havePrev bool
	prevT    float64
	prevF    float64
	fs       float64 // smoothed flow
	// alpha is the smoothing weight for steps in [alphaLo, alphaHi]: the
	// step it was computed for, less and more a part in a million.
	alpha            float64
	alphaLo, alphaHi float64
	skipped          uint64

	// The open breath.
	startT float64
	// endByT is the time past which the open breath is dropped: startT +
	// MaxBreathS, +Inf while waiting for a breath (one comparison a sample
	// rather than a phase test, a subtraction and a comparison).
	endByT   float64
	vol      float64 // volume since the start of the breath (L)
	cur      segment
	artifact bool
	buf      decimator

	// End of inspiration.
	expCand     bool
	expCandT    float64
	expCandV    float64
	expHoldT    float64 // time the flow first fell below −trigger
	expStartT   float64
	expStartV   float64
	pauseStartT float64 // NaN when not in a pause
	plateau     float64
	pauseLen    float64

	// Tentative start of the next inspiration.
	inCand  bool
	candT   float64
	candV   float64 // volume of the open breath at the crossing
	pend    segment
	pendVol float64
	inHoldT float64 // time the flow first rose above the trigger

	// nextStartT is the onset of the inspiratory rise found when the
	// previous breath finished: the start of the open breath.
	nextStartT float64
	// crossStartT is the flow crossing that opened the breath; its
	// volumes are counted from it.
	crossStartT float64

	// Flow correction applied to every sample: a constant offset (L/s) and
	// a leak conductance (L/s per cmH2O) estimated from the volume balance
	// of past breaths (see balance).
	offB, leakK float64
	meanP       float64 // mean airway pressure of the breath the correction was last set on
	bal         balance
	prevTrapML  float64 // smoothed trapped-volume estimate up to the breath before, for the balance
	prevPEEP    float64 // end-expiratory pressure of the breath before, for the balance
	settings    settingsTracker
	k2Pool      rohrerPool // K2/R of the recent breaths (see rohrerPool)
	slowPool    slowPool   // marks of a slow end over the recent breaths

	ring ring
	last Breath // the breath completed by the latest push
}

// NewAnalyzer returns an analyzer for stream with cfg. cfg should have passed
// Validate; out-of-range values are not checked again here.
func NewAnalyzer(stream string, cfg Config) *Analyzer {
	a := &Analyzer{stream: stream, cfg: cfg}
	a.trigMaxLPS, a.trigMinLPS = cfg.TriggerFlowLPM/60, cfg.MinTriggerFlowLPM/60
	if !(cfg.TriggerFraction > 0) {
		a.trigMinLPS = a.trigMaxLPS // fixed
	}
	a.pauseFlowLPS = cfg.PauseFlowLPM / 60
	// The ring must reach back past the longest window read from it: the
	// onset search (onsetLookbackS, or onsetBaseS of baseline) and the end
	// windows, each seen up to a confirmation delay later; twice that
	// leaves a margin.
	a.ring = newRing(2 * (onsetLookbackS + cfg.HoldS + max(onsetBaseS, cfg.EndExpWindowS, cfg.PlateauWindowS)))
	a.Reset()
	return a
}

// Stream returns the stream id the analyzer labels its breaths with.
func (a *Analyzer) Stream() string { return a.stream }

// Skipped returns how many samples were ignored so far because their time
// was not finite or did not increase.
func (a *Analyzer) Skipped() uint64 { return a.skipped }

// Reset forgets the open breath, the sample history, the pooled Rohrer K2
// and the pooled marks of a slow end, so that no breath spans a gap or a
// reconnection. Breath numbering continues; the flow offset and leak
// estimates, which belong to the sensor, are kept.
func (a *Analyzer) Reset() {
	a.ph = phaseWait
	a.endByT = math.Inf(1)
	a.havePrev = false
	a.inCand = false
	a.ring.reset()
	a.resetBreath()
	a.settings.reset()
	a.prevTrapML, a.prevPEEP = math.NaN(), math.NaN()
	// The pooled K2 describes the airways of the breaths before the gap;
	// after a disconnection they may be another patient's.
	a.k2Pool, a.slowPool = rohrerPool{}, slowPool{}
	a.trigLPS = a.trigMaxLPS // until an inspiration scales it
}

func (a *Analyzer) resetBreath() {
	a.cur.reset()
	a.pend.reset()
	a.buf.reset()
	a.vol = 0
	a.artifact = false
	a.expCand = false
	a.expHoldT = math.NaN()
	a.expStartT = math.NaN()
	a.expStartV = math.NaN()
	a.pauseStartT = math.NaN()
	a.plateau = math.NaN()
	a.pauseLen = math.NaN()
}

// Push feeds one sample and returns the breath that it completed, if any. A
// breath completes when the next inspiration is confirmed, HoldS after it
// started. Samples with non-finite values are dropped (the open breath is
// flagged "artifact"); samples whose time does not increase are skipped; a
// step in time longer than MaxGapS resets the analyzer.
func (a *Analyzer) Push(s ingest.Sample) (Breath, bool) {
	if a.push(s) {
		return a.last, true
	}
	return Breath{}, false
}

// Next is Push without the copy of the record: it returns the breath that
// the sample completed, or nil. The record belongs to the analyzer and is
// valid until the next call of Next, Push or Reset; a caller that keeps it
// copies it.
func (a *Analyzer) Next(s ingest.Sample) *Breath {
	if a.push(s) {
		return &a.last
	}
	return nil
}

// NextIn is Next over the samples at the start of ss whose times lie in
// [fromS, toS): it feeds them in order until one completes a breath or
// the next one's time is outside the interval (a NaN time included), and
// returns how many it fed and the breath, or nil. A caller that must act
// at given times (an offline pipeline's ticks) feeds a run in one call.
func (a *Analyzer) NextIn(ss []ingest.Sample, fromS, toS float64) (int, *Breath) {
	for i := range ss {
		if t := ss[i].TimeS; !(t >= fromS && t < toS) {
			return i, nil
		}
		if a.push(ss[i]) {
			return i + 1, &a.last
		}
	}
	return len(ss), nil
}

// push is Push without the copy of the record (a Breath is a few hundred
// bytes; copying one per sample would dominate the cost of analysis). It
// reports whether a.last holds a newly completed breath.
func (a *Analyzer) push(s ingest.Sample) bool {
	t, p, f := s.TimeS, s.PressureCmH2O, s.FlowLPS
	// x−x is 0 for a finite x and NaN for NaN and ±Inf, and a NaN carries
	// through the sum: one test a sample for all three.
	if (t-t)+(p-p)+(f-f) != 0 {
		if t-t == 0 {
			a.artifact = a.ph != phaseWait
		}
		a.skipped++
		return false
	}
	// The sensor's offset and the leak, as estimated so far.
	f -= a.offB + a.leakK*p
	if a.ring.next == 0 {
		a.ring.lap(t) // before the write that comes back to slot 0
	}
	if !a.havePrev {
		a.havePrev = true
		a.prevT, a.prevF, a.fs = t, f, f
		a.ring.push(t, p, f)
		return false
	}
	dt := t - a.prevT
	if !(dt > 0) {
		a.skipped++
		return false
	}
	if dt > a.cfg.MaxGapS {
		a.Reset()
		a.havePrev = true
		a.prevT, a.prevF, a.fs = t, f, f
		a.ring.push(t, p, f)
		return false
	}
	a.ring.push(t, p, f)
	// Recomputed only when the step changes by more than rounding: the
	// timestamps of a fixed sampling rate differ in their last bits (by a
	// part in 10⁸ of a 5 ms step after a day of signal), and a division
	// per sample is a measurable share of the cost. A step a part in a
	// million off changes the weight by less than that.
	if dt < a.alphaLo || dt > a.alphaHi {
		a.alpha = dt / (flowSmoothS + dt)
		a.alphaLo, a.alphaHi = dt*(1-1e-6), dt*(1+1e-6)
	}
	a.fs += (f - a.fs) * a.alpha

	done := false
	switch a.ph {
	case phaseWait:
		a.stepWait(t, f, p, dt)
	case phaseInsp:
		a.stepInsp(t, f, p, dt)
	case phaseExp:
		if !a.inCand && !(a.prevF <= a.trigLPS && f > a.trigLPS) {
			// Most samples: expiration, no start of inspiration in
			// sight. What track would do, without its two calls.
			a.vol += 0.5 * (a.prevF + f) * dt
			a.cur.add(f, a.vol, p)
			a.buf.add(t, f, a.vol, p)
			break
		}
		done = a.stepExp(t, f, p, dt)
	}
	if t > a.endByT {
		// Apnea, a flat line or a stuck sensor: drop the open breath rather
		// than report one that spans it.
		a.ph = phaseWait
		a.endByT = math.Inf(1)
		a.inCand = false
		a.resetBreath()
	}
	a.prevT, a.prevF = t, f
	return done
}

// begin opens a breath at the confirmed crossing, taking over the samples
// accumulated since it.
func (a *Analyzer) begin() {
	a.resetBreath()
	a.ph = phaseInsp
	a.openAt(a.candT)
	a.crossStartT = a.candT
	a.cur = a.pend
	a.vol = a.pendVol
	a.inCand = false
	a.pend.reset()
}

func (a *Analyzer) stepWait(t, f, p, dt float64) {
	if a.track(t, f, p, dt) {
		a.begin()
	}
}

func (a *Analyzer) stepInsp(t, f, p, dt float64) {
	a.vol += 0.5 * (a.prevF + f) * dt
	a.cur.add(f, a.vol, p)
	a.buf.add(t, f, a.vol, p)

	// End-inspiratory pause: smoothed |flow| under the pause threshold after
	// flow has been delivered (common practice: below ~2–5 % of peak flow or
	// 1–3 L/min).
	thr := a.cfg.PauseFlowFraction * a.cur.maxF // plain compare: math.Max costs per sample
	if thr < a.pauseFlowLPS {
		thr = a.pauseFlowLPS
	}
	if math.IsNaN(a.pauseStartT) {
		if a.cur.maxF > a.trigLPS && math.Abs(a.fs) < thr {
			a.pauseStartT = t
		}
	} else if a.fs >= thr {
		a.pauseStartT = math.NaN()
	}

	// Start of expiration: flow falling below the trigger (scaled to this
	// inspiration's flow, see scaledTrigger) and staying there for HoldS;
	// the phase starts at the zero crossing before it.
	trig := a.scaledTrigger(a.cur.maxF)
	if !a.expCand {
		if !(a.prevF >= -trig && f < -trig) {
			return
		}
		tc, dv := a.edge(t, f)
		a.expCand = true
		a.expCandT = tc
		a.expCandV = a.vol - 0.5*(a.prevF+f)*dt + dv
		a.expHoldT = t
	}
	if f >= -trig {
		a.expCand = false
		return
	}
	if t-a.expHoldT < a.cfg.HoldS || a.expCandT-a.startT < a.cfg.MinPhaseS {
		return
	}
	a.ph = phaseExp
	a.expStartT = a.expCandT
	a.expStartV = a.expCandV
	a.expCand = false
	a.trigLPS = trig // the next inspiration's, scaled to this one's flow
	if !math.IsNaN(a.pauseStartT) {
		a.pauseLen = a.expStartT - a.pauseStartT
		if a.pauseLen >= a.cfg.MinPauseS {
			if mp, _, _, n := a.ring.window(a.expStartT-a.cfg.PlateauWindowS, a.expStartT); n > 0 {
				a.plateau = mp
			}
		}
	}
}

func (a *Analyzer) stepExp(t, f, p, dt float64) bool {
	if !a.track(t, f, p, dt) {
		return false
	}
	if a.candT-a.expStartT < a.cfg.MinPhaseS {
		// Too soon after the start of expiration: keep treating it as
		// tentative until the flow falls back (then it merges) or the
		// expiration is long enough.
		return false
	}
	a.last = a.finish()
	a.begin()
	a.openAt(a.nextStartT)
	return true
}

// openAt starts the open breath at t, with the time past which it is
// dropped.
func (a *Analyzer) openAt(t float64) {
	a.startT, a.endByT = t, t+a.cfg.MaxBreathS
}
