package analyze

import (
	"math"
	"slices"
)

// Ventilation modes inferred from the waveform (Breath.Mode).
const (
	ModeVolume   = "vc" // the ventilator set the inspiratory flow
	ModePressure = "pc" // the ventilator set the inspiratory pressure
)

// pcFlatness is the largest relative departure of the inspiratory
// pressure from a flat line under pressure control (our choice: 3 %, well
// above sensor noise at adult pressures, well below the climb of volume
// control, where the elastic pressure of the tidal volume adds tens of
// per cent).
const pcFlatness = 0.03

// settingsConfirm is how many consecutive breaths must agree on new
// settings before a change is reported (our choice: one odd breath, a
// trigger or an artefact, is not a change of settings).
const settingsConfirm = 3

// inferred holds the ventilator settings read from one breath.
type inferred struct {
	mode                             string
	rate, vt, flow, pinsp, ti, pause float64
	peep                             float64
}

// settingsTracker infers the ventilator's settings from each breath's
// waveform and reports a change once settingsConfirm breaths in a row
// agree on settings that differ from the reference.
type settingsTracker struct {
	ref    inferred
	hasRef bool
	recent [settingsConfirm]inferred
	n      int
}

func (s *settingsTracker) reset() { *s = settingsTracker{} }

// observe infers the settings of breath b, stores them in the record, and
// when a change is confirmed lists it in b.SettingsChanged and flags the
// breath. corrLPS is the mean flow correction (offset and leak) that was
// taken off the breath's inspiration: it is put back, so that the volume
// and flow are those the sensor read, where the ventilator's settings
// show, rather than the estimate of what reached the patient. The
// correction's estimate moves: its split between offset and leak can
// swing with the scatter of a few breaths (a leak of 0.1 L/min per cmH2O
// against an offset of −1.5 L/min on a clean lung in a resistance ramp),
// which read as changes of set volume and flow on 78 of the 480 patients
// of the acceptance grid at 50 Hz (289 changes); from the sensor's
// volumes, 11 (11), all with a leak of 5–10 % whose volume grew with the
// airway pressure (docs/analysis.md, Inferred settings).
func (s *settingsTracker) observe(b *Breath, flags *[]string, pauseS, maxFlowLPS, corrLPS float64) {
	cur := inferred{mode: b.Mode, rate: b.RateBPM, vt: b.VtiML + 1000*corrLPS*b.TiS, flow: 60 * (maxFlowLPS + corrLPS),
		pinsp: b.PeakCmH2O - b.PEEPCmH2O, ti: b.TiS, pause: nanTo0(pauseS), peep: b.PEEPCmH2O}
	// The pause is its measured length even when it is too short to
	// yield a plateau: a set pause near min_pause_s would otherwise come
	// and go with noise and read as settings changes.
	if b.Mode == ModePressure {
		b.SetInspPressureCmH2O = cur.pinsp
	} else if b.Mode == ModeVolume {
		b.SetFlowLPM = cur.flow
	}
	if b.HasFlag(FlagArtifact) || b.HasFlag(FlagShort) {
		return
	}
	copy(s.recent[1:], s.recent[:settingsConfirm-1])
	s.recent[0] = cur
	s.n = min(s.n+1, settingsConfirm)
	if !s.hasRef {
		if s.n == settingsConfirm && s.agree() {
			s.ref, s.hasRef = cur, true
		}
		return
	}
	if s.n < settingsConfirm || !s.agree() {
		return
	}
	ch := changes(&s.ref, &cur)
	if len(ch) == 0 {
		return
	}
	b.SettingsChanged = ch
	*flags = append(*flags, FlagSettingsChanged)
	s.ref = cur
	s.n = 0
}

// agree reports whether the recent breaths share one set of settings.
func (s *settingsTracker) agree() bool {
	for i := 1; i < s.n; i++ {
		if len(changes(&s.recent[0], &s.recent[i])) > 0 {
			return false
		}
	}
	return true
}

// changes lists what differs between two inferred settings, each as
// "<setting>-up" or "<setting>-down" (or "mode-vc", "mode-pc"). The
// tolerances are our choice: well above the breath-to-breath noise of the
// simulated sensors, below the smallest step a clinician would make.
func changes(ref, cur *inferred) []string {
	var out []string
	step := func(name string, a, b, abs, rel float64) {
		if math.IsNaN(a) || math.IsNaN(b) {
			return
		}
		if d := b - a; math.Abs(d) > math.Max(abs, rel*math.Abs(a)) {
			if d > 0 {
				out = append(out, name+"-up")
			} else {
				out = append(out, name+"-down")
			}
		}
	}
	if ref.mode != cur.mode && ref.mode != "" && cur.mode != "" {
		return []string{"mode-" + cur.mode}
	}
	step("rate", ref.rate, cur.rate, 1.5, 0.08)
	step("peep", ref.peep, cur.peep, 1.5, 0)
	step("ti", ref.ti, cur.ti, 0.12, 0.12)
	step("pause", ref.pause, cur.pause, 0.15, 0)
	if cur.mode == ModeVolume {
		step("vt", ref.vt, cur.vt, 30, 0.1)
		step("flow", ref.flow, cur.flow, 5, 0.12)
	} else {
		step("pinsp", ref.pinsp, cur.pinsp, 2, 0.12)
	}
	return slices.Clip(out)
}

// inferMode tells volume from pressure control by which of pressure and
// flow the ventilator held to a simple shape over the middle of the
// inspiration (before any pause): under pressure control the pressure is
// flat while the flow decays; under volume control the flow is flat or a
// straight ramp while the pressure climbs. Each is measured by the
// residual of a straight line, relative to the signal's mean above its
// baseline.
func (a *Analyzer) inferMode(peep float64) string {
	from := a.startT + 0.5*(a.expStartT-a.startT)
	to := a.expStartT
	if !math.IsNaN(a.plateau) {
		to -= a.pauseLen
	}
	var lp, lf linreg
	for i := 0; i < a.buf.n; i++ {
		q := &a.buf.pts[i]
		if q.t >= from && q.t < to {
			lp.add(q.t-from, q.p-peep)
			lf.add(q.t-from, q.f)
		}
	}
	if lp.n < 5 {
		return ""
	}
	rp, rf := lp.relResidual(true), lf.relResidual(false)
	if math.IsNaN(rp) || math.IsNaN(rf) {
		return ""
	}
	// Pressure control holds the pressure flat: within pcFlatness of its
	// level above PEEP, slope included. Volume control lets the pressure
	// climb with volume while it holds the flow to a line (constant or a
	// decelerating ramp).
	if rp < pcFlatness && rp < rf {
		return ModePressure
	}
	return ModeVolume
}

// relResidual is the residual standard deviation of the line fit relative
// to |mean y|, plus, when withSlope, a quarter of the relative change the
// slope makes over the span.
func (l *linreg) relResidual(withSlope bool) float64 {
	if l.n < 3 {
		return math.NaN()
	}
	mx, my := l.sx/l.n, l.sy/l.n
	cxx := l.sxx - l.n*mx*mx
	cxy := l.sxy - l.n*mx*my
	cyy := l.syy - l.n*my*my
	if !(cxx > 0) || my == 0 {
		return math.NaN()
	}
	slope := cxy / cxx
	ss := math.Max(0, cyy-slope*cxy)
	r := math.Sqrt(ss / l.n)
	if withSlope {
		r += math.Abs(slope) * math.Sqrt(12*cxx/l.n) / 4 // √(12·var) is the span of evenly spaced x
	}
	return r / math.Abs(my)
}

// inspCorrection is the mean flow correction (L/s) taken off the samples
// of the breath's inspiration: the offset, and the leak at the mean
// inspiratory pressure, read from the decimated points.
func (a *Analyzer) inspCorrection() float64 {
	if a.leakK == 0 {
		return a.offB
	}
	sp, n := 0.0, 0
	for i := range a.buf.pts[:a.buf.n] {
		if q := &a.buf.pts[i]; q.t >= a.startT && q.t < a.expStartT {
			sp += q.p
			n++
		}
	}
	if n == 0 {
		return a.offB
	}
	return a.offB + a.leakK*sp/float64(n)
}
