package analyze

import (
	"fmt"
	"math"
	"slices"
	"strings"
	"sync"
)

// RisingPeak detects a sustained rise of peak inspiratory pressure: the
// Theil–Sen slope of peak pressure against time over a fixed window,
// relative to the window's median peak. The evidence splits the rise into
// its resistive part (peak − plateau, or R × inspiratory flow) and its
// elastic part (plateau, or VT/C): under constant-flow volume control
// Ppeak = Pplat + R·V' and Pplat = total PEEP + VT/C (derived), so a
// widening peak–plateau gap means rising resistance (secretions, kinked
// tube, bronchospasm) and a rising plateau means falling compliance or
// rising intrinsic PEEP.
type RisingPeak struct {
	cfg     RisingPeakConfig
	ring    []rpBreath
	next, n int
	present bool
	sev     Severity // of the last present verdict
	xs, ys  []float64
	// restarted holds the settings changes that restarted the window
	// until it has filled again (see Breath); lastChange keeps the last
	// changes inferred, and lastChangeS their time, for the attribution of
	// a rise that follows.
	restarted   []string
	lastChange  []string
	lastChangeS float64
}

type rpBreath struct {
	tS      float64
	peak    float64
	plat    float64 // NaN without a pause
	resist  float64 // R·V'peak from the fit, cmH2O
	elastic float64 // VT/C from the fit, cmH2O
	r, c    float64
	changes []string // settings changes inferred at this breath
}

var _ BreathDetector = (*RisingPeak)(nil)

// NewRisingPeak returns a rising-peak-pressure detector; cfg must be valid.
func NewRisingPeak(cfg RisingPeakConfig) *RisingPeak {
	cfg.WindowBreaths = max(cfg.WindowBreaths, 3)
	return &RisingPeak{
		cfg:  cfg,
		ring: make([]rpBreath, cfg.WindowBreaths),
		xs:   make([]float64, 0, cfg.WindowBreaths),
		ys:   make([]float64, 0, cfg.WindowBreaths),
	}
}

// Conditions implements BreathDetector.
func (d *RisingPeak) Conditions() []string { return []string{CondRisingPeakPressure} }

// Reset implements BreathDetector.
func (d *RisingPeak) Reset() {
	d.next, d.n, d.present, d.restarted, d.lastChange = 0, 0, false, nil, nil
}

// Breath implements BreathDetector.
func (d *RisingPeak) Breath(b *Breath, dst []Finding) []Finding {
	cfg := &d.cfg
	t := detFirstFinite(b.EndS, b.StartS)
	f := Finding{Condition: CondRisingPeakPressure, Class: Physiological, TimeS: t, BreathSeq: b.Seq,
		Evidence: map[string]float64{}}
	if math.IsNaN(t) || math.IsNaN(b.PeakCmH2O) || b.HasFlag("artifact") {
		// Not usable: keep the verdict, add nothing to the window.
		f.Present = d.present
		if d.present {
			f.Severity = SeverityLow
		}
		f.Message = "breath without a usable peak pressure; verdict unchanged"
		return append(dst, f)
	}
	d.add(b, t)
	first := d.windowStart(t)
	count := d.n - first
	spanS := t - d.at(first).tS
	f.Evidence["window_breaths"] = float64(count)
	detPut(f.Evidence, "window_s", spanS, 1)
	if count < cfg.MinBreaths || spanS < 0.9*cfg.WindowS {
		if d.restarted != nil {
			f.Present = d.present
			if d.present {
				f.Severity = d.sev
			}
			f.Evidence["settings_changes"] = float64(len(d.restarted))
			f.Message = fmt.Sprintf("peak pressure trend restarted: it follows %s %.0f s ago; verdict held until %.0f s of breaths",
				describeChanges(d.restarted), spanS, 0.9*cfg.WindowS)
			return append(dst, f)
		}
		d.present = false
		f.Message = fmt.Sprintf("not enough history for a trend (%d breaths over %.0f s)", count, spanS)
		return append(dst, f)
	}
	d.restarted = nil

	slope := d.slope(first, func(e *rpBreath) float64 { return e.peak })
	med := d.median(first, func(e *rpBreath) float64 { return e.peak })
	pct := 100 * slope / med
	detPut(f.Evidence, "peak_slope_cmh2o_per_min", slope, 3)
	detPut(f.Evidence, "peak_slope_pct_per_min", pct, 2)
	detPut(f.Evidence, "pip_median_cmh2o", med, 2)
	if d.present {
		d.present = pct >= cfg.ClearSlopePctPerMin
	} else {
		d.present = pct >= cfg.SlopePctPerMin
	}
	f.Present = d.present

	if !f.Present {
		f.Message = fmt.Sprintf("peak pressure trend %+.2f %%/min over %.0f s", pct, spanS)
		return append(dst, f)
	}
	kind := d.attribute(&f, first, count)
	f.Severity = SeverityLow
	if pct >= cfg.HighSlopePctPerMin {
		f.Severity = SeverityMedium
	}
	d.sev = f.Severity
	f.Message = fmt.Sprintf("peak pressure rising %.2f cmH2O/min (%.1f %%/min) over the last %.0f s; the rise is %s",
		slope, pct, spanS, kind)
	return append(dst, f)
}

// add puts breath b, ending at t, into the window.
func (d *RisingPeak) add(b *Breath, t float64) {
	if d.n > 0 && t < d.ring[(d.next+len(d.ring)-1)%len(d.ring)].tS {
		d.Reset() // the stream clock went back: start a new window
	}
	e := rpBreath{tS: t, peak: b.PeakCmH2O, plat: b.PlateauCmH2O, r: b.RCmH2OSPerL, c: b.CMLPerCmH2O,
		resist: math.NaN(), elastic: math.NaN(), changes: b.SettingsChanged}
	if b.RCmH2OSPerL > 0 && b.PeakInspFlowLPM > 0 {
		e.resist = b.RCmH2OSPerL * b.PeakInspFlowLPM / 60
	}
	if vt := detFirstFinite(b.VtiML, b.VteML); b.CMLPerCmH2O > 0 && vt > 0 {
		e.elastic = vt / b.CMLPerCmH2O
	}
	d.ring[d.next] = e
	d.next = (d.next + 1) % len(d.ring)
	d.n = min(d.n+1, len(d.ring))
	// A change of PEEP or of the inspiratory pressure moves the peak in
	// one step, which a slope over a window across it reads as a rise. The
	// window starts again at the change, and the verdict is held while it
	// fills, so that a step is not an alarm and an alarm already raised
	// does not clear because the settings changed. Other inferred changes
	// (rate, tidal volume, flow, mode) only explain a rise: inferred from
	// the waveform they also appear, now and then, on a patient whose
	// mechanics change (a leak moves the measured volume), and a rise must
	// not be missed for them.
	if len(e.changes) > 0 {
		d.lastChange, d.lastChangeS = e.changes, t
	}
	if slices.ContainsFunc(e.changes, stepsPeak) {
		d.n, d.restarted = 1, e.changes
	}
}

// windowStart returns the oldest breath of the window: the most recent
// breaths within WindowS of t.
func (d *RisingPeak) windowStart(t float64) int {
	first := d.n
	for i := d.n - 1; i >= 0; i-- {
		if t-d.at(i).tS > d.cfg.WindowS {
			break
		}
		first = i
	}
	return first
}

// attribute says why the peak rises, filling the evidence of f: the
// resistive and elastic parts of the rise over breaths first..n−1 (count
// of them), checked against the resistance and compliance trends, or a
// settings change inside the window.
func (d *RisingPeak) attribute(f *Finding, first, count int) string {
	// Attribution (only for a present rise, to save the work): from the
	// pause when most breaths have one, otherwise from the least-squares R
	// and C.
	var res, ela float64
	withPause := 0
	for i := first; i < d.n; i++ {
		if !math.IsNaN(d.at(i).plat) {
			withPause++
		}
	}
	if 2*withPause >= count {
		res = d.slope(first, func(e *rpBreath) float64 { return e.peak - e.plat })
		ela = d.slope(first, func(e *rpBreath) float64 { return e.plat })
		f.Evidence["from_pause"] = 1
	} else {
		res = d.slope(first, func(e *rpBreath) float64 { return e.resist })
		ela = d.slope(first, func(e *rpBreath) float64 { return e.elastic })
		f.Evidence["from_pause"] = 0
	}
	detPut(f.Evidence, "resistive_slope_cmh2o_per_min", res, 3)
	detPut(f.Evidence, "elastic_slope_cmh2o_per_min", ela, 3)
	rSlope := d.slope(first, func(e *rpBreath) float64 { return e.r })
	cSlope := d.slope(first, func(e *rpBreath) float64 { return e.c })
	detPut(f.Evidence, "r_slope_cmh2o_s_per_l_per_min", rSlope, 3)
	detPut(f.Evidence, "c_slope_ml_per_cmh2o_per_min", cSlope, 3)
	kind := "of unclear cause"
	// Only rises count towards the split; a falling part is not a cause.
	// A cause is named only when the signs of the evidence agree: a
	// resistive rise needs the resistance trend up, an elastic one the
	// compliance trend down (an unknown trend does not contradict).
	rp, ep := max(res, 0), max(ela, 0)
	if frac := rp / (rp + ep); !math.IsNaN(frac) && !math.IsInf(frac, 0) {
		f.Evidence["resistive_fraction"] = detRound(frac, 2)
		switch {
		case frac >= 0.5 && !(rSlope <= 0):
			kind = "resistive (peak–plateau gap widening, resistance rising)"
		case frac < 0.5 && !(cSlope >= 0):
			kind = "elastic (plateau rising, compliance falling)"
		default:
			kind = "of unclear cause (the resistance and compliance trends do not agree with the pressures)"
		}
	}
	// A settings change inside the window, or one that restarted it less
	// than two windows ago, explains a rise better than the patient does.
	ch := d.changesSince(first)
	if len(ch) == 0 && d.lastChange != nil && f.TimeS-d.lastChangeS <= 2*d.cfg.WindowS {
		ch = d.lastChange
	}
	if len(ch) > 0 {
		f.Evidence["settings_changes"] = float64(len(ch))
		kind = "after a settings change: it follows " + describeChanges(ch)
	}
	return kind
}

// changesSince lists the settings changes inferred over breaths
// first..n−1, oldest first, without repeats.
func (d *RisingPeak) changesSince(first int) []string {
	var out []string
	for i := first; i < d.n; i++ {
		for _, c := range d.at(i).changes {
			if !slices.Contains(out, c) {
				out = append(out, c)
			}
		}
	}
	return out
}

// stepsPeak reports whether an inferred settings change moves the peak
// pressure by itself, one for one: PEEP, or the inspiratory pressure of
// pressure control.
func stepsPeak(change string) bool {
	switch change {
	case "peep-up", "peep-down", "pinsp-up", "pinsp-down":
		return true
	}
	return false
}

// changeWords names the inferred settings changes in plain words.
var changeWords = map[string]string{
	"rate-up": "a rate increase", "rate-down": "a rate decrease",
	"peep-up": "a PEEP increase", "peep-down": "a PEEP decrease",
	"vt-up": "a tidal volume increase", "vt-down": "a tidal volume decrease",
	"flow-up": "an inspiratory flow increase", "flow-down": "an inspiratory flow decrease",
	"pinsp-up": "a higher inspiratory pressure", "pinsp-down": "a lower inspiratory pressure",
	"ti-up": "a longer inspiratory time", "ti-down": "a shorter inspiratory time",
	"pause-up": "a longer pause", "pause-down": "a shorter pause",
	"mode-vc": "a switch to volume control", "mode-pc": "a switch to pressure control",
}

// describeChanges joins the plain words of changes.
func describeChanges(ch []string) string {
	words := make([]string, 0, len(ch))
	for _, c := range ch {
		if w, ok := changeWords[c]; ok {
			words = append(words, w)
		} else {
			words = append(words, c)
		}
	}
	return strings.Join(words, " and ")
}

// at returns the i-th oldest breath in the ring.
func (d *RisingPeak) at(i int) *rpBreath {
	return &d.ring[(d.next-d.n+i+2*len(d.ring))%len(d.ring)]
}

// slope is the Theil–Sen slope per minute of get over breaths first..n−1,
// skipping unknown values.
func (d *RisingPeak) slope(first int, get func(*rpBreath) float64) float64 {
	d.xs, d.ys = d.xs[:0], d.ys[:0]
	for i := first; i < d.n; i++ {
		e := d.at(i)
		if v := get(e); !math.IsNaN(v) && !math.IsInf(v, 0) {
			d.xs = append(d.xs, e.tS/60)
			d.ys = append(d.ys, v)
		}
	}
	if len(d.xs) < 3 {
		return math.NaN()
	}
	// The pairwise slopes are scratch space used only here: shared through
	// a pool rather than kept per stream, which would cost every stream
	// window×(window−1)/2 floats (36 KiB at 96 breaths) for nothing.
	buf := theilSenScratch.Get().(*[]float64)
	var s float64
	s, *buf = detTheilSen(d.xs, d.ys, *buf)
	theilSenScratch.Put(buf)
	return s
}

// theilSenScratch holds the pairwise-slope buffers of detTheilSen.
var theilSenScratch = sync.Pool{New: func() any { return new([]float64) }}

func (d *RisingPeak) median(first int, get func(*rpBreath) float64) float64 {
	d.ys = d.ys[:0]
	for i := first; i < d.n; i++ {
		if v := get(d.at(i)); !math.IsNaN(v) {
			d.ys = append(d.ys, v)
		}
	}
	return detMedian(d.ys)
}
