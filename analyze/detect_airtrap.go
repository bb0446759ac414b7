package analyze

import (
	"fmt"
	"math"
)

// maxAirTrappingWindow bounds the N-of-M window (and the validation of M).
const maxAirTrappingWindow = 64

// AirTrapping detects dynamic hyperinflation from breath records. It
// combines the waveform sign (expiratory flow not back to zero when the
// next breath starts; Nguyen, Pastor, L'Her, BioMed Eng OnLine 2012) with
// the magnitude of the estimated intrinsic PEEP and trapped volume, the
// ratio of expiratory time to time constant (below 3, expiration cannot be
// complete: 1 − e⁻³ = 95 %), and the build-up sign: inspired volume above
// expired volume over the window while the trapped-volume estimate rises.
type AirTrapping struct {
	cfg     AirTrappingConfig
	ring    []atBreath // the last M breaths, M entries
	next    int        // index of the next slot to write
	n       int        // breaths in the ring (≤ M)
	present bool
	buf     []float64
}

// atBreath is what the detector keeps of one breath.
type atBreath struct {
	seq      int
	positive bool
	eefLPM   float64
	peepi    float64
	trapped  float64
	// trend is the trapped-volume estimate the build-up trend reads: the
	// inflow share (inflowShare) is left out of it, because during a true
	// build-up the balance it reads is the build-up itself.
	trend   float64
	teOvTau float64
	tauS    float64
	teS     float64
	tiS     float64
	vtML    float64
	dVolML  float64 // inspired − expired volume
	flagged bool    // estimates a single-compartment what-if cannot rely on
}

var _ BreathDetector = (*AirTrapping)(nil)

// NewAirTrapping returns an air-trapping detector; cfg must be valid.
func NewAirTrapping(cfg AirTrappingConfig) *AirTrapping {
	cfg.M = min(max(cfg.M, 1), maxAirTrappingWindow)
	cfg.N = min(max(cfg.N, 1), cfg.M)
	cfg.ClearN = min(max(cfg.ClearN, 1), cfg.N)
	if !(cfg.ClearFraction > 0 && cfg.ClearFraction <= 1) {
		cfg.ClearFraction = 1 // no hysteresis of the magnitude
	}
	return &AirTrapping{cfg: cfg, ring: make([]atBreath, cfg.M), buf: make([]float64, 0, maxAirTrappingWindow)}
}

// Conditions implements BreathDetector.
func (d *AirTrapping) Conditions() []string { return []string{CondAirTrapping} }

// Reset implements BreathDetector.
func (d *AirTrapping) Reset() { d.next, d.n, d.present = 0, 0, false }

// detFirstFinite returns the first finite value of vs, or NaN.
func detFirstFinite(vs ...float64) float64 {
	for _, v := range vs {
		if !math.IsNaN(v) && !math.IsInf(v, 0) {
			return v
		}
	}
	return math.NaN()
}

// Breath implements BreathDetector.
func (d *AirTrapping) Breath(b *Breath, dst []Finding) []Finding {
	cfg := &d.cfg
	cur := atBreathOf(b)
	idx := d.next
	d.ring[idx] = cur
	d.next = (d.next + 1) % cfg.M
	d.n = min(d.n+1, cfg.M)

	// Build-up over the window: a positive volume balance (inspired minus
	// expired, which is the change in end-expiratory volume) confirmed by a
	// rise of the trapped-volume estimate of at least half as much, two
	// independent measurements; a flow offset or a leak moves the balance
	// but not the estimate. Build-up halves the magnitude thresholds, so
	// that trapping still growing is caught before it reaches them.
	balance, slope := d.buildUp()
	building := balance >= cfg.BalanceML && slope*float64(d.n-1) >= cfg.BalanceML/2

	pos := d.positive(b, &cur, building)
	d.ring[idx].positive = pos

	count := d.positiveCount()
	// N of M to become present, ClearN of M to stay present (hysteresis).
	present := count >= cfg.N || (d.present && count >= cfg.ClearN)
	d.present = present

	f := Finding{
		Condition: CondAirTrapping,
		Class:     Physiological,
		Present:   present,
		TimeS:     b.EndS,
		BreathSeq: b.Seq,
		Evidence: map[string]float64{
			"positive_breaths": float64(count),
			"window_breaths":   float64(d.n),
		},
	}
	if math.IsNaN(f.TimeS) {
		f.TimeS = b.StartS
	}
	putBuildUpEvidence(f.Evidence, &cur, balance, slope, building)

	// Magnitude: the median over the positive breaths is robust to one
	// outlying estimate; when absent, report the current breath.
	peepi, trapped := d.positiveMedians()
	if !present {
		peepi, trapped = cur.peepi, cur.trapped
	}
	detPut(f.Evidence, "peepi_cmh2o", peepi, 2)
	detPut(f.Evidence, "trapped_ml", trapped, 1)

	if !present {
		f.Message = fmt.Sprintf("no air trapping: %d of the last %d breaths show it (need %d)", count, d.n, cfg.N)
		return append(dst, f)
	}
	d.grade(&f, count, peepi, trapped)

	d.predict(&f, &cur)
	return append(dst, f)
}

// positive judges one breath as a trapping breath.
func (d *AirTrapping) positive(b *Breath, cur *atBreath, building bool) bool {
	cfg := &d.cfg
	// Scale-free criterion: the magnitude is intrinsic PEEP (a pressure,
	// whatever the resistance), or the trapped volume when no pressure
	// estimate exists; the end-expiratory flow in L/min only supports it
	// (at a high resistance a small flow is a large pressure). The
	// time-constant evidence must agree: expiration shorter than
	// TeOverTauMax time constants (the end-expiratory one when the lung
	// empties slower at the end).
	// The pressure is the median of this breath's estimate and the two
	// before it: one noisy breath neither makes nor breaks a positive.
	peepi := d.recentMedianPEEPi()
	mag := func(k float64) bool {
		if !math.IsNaN(peepi) {
			return peepi >= k*cfg.PEEPiCmH2O
		}
		return cur.trapped >= k*cfg.TrappedML
	}
	// Unknown Te/τ neither vetoes nor supports.
	tauOK := math.IsNaN(cur.teOvTau) || cur.teOvTau < cfg.TeOverTauMax
	// Hysteresis of the magnitude: once present, a breath counts from
	// ClearFraction of the thresholds, so estimates scattering around the
	// raising threshold for an unchanged patient do not clear the alarm
	// only to raise it again a few breaths later.
	k := 1.0
	if d.present {
		k = cfg.ClearFraction
	}
	return (mag(k) || (building && mag(0.5*k))) && tauOK && !b.HasFlag(FlagArtifact)
}

// positiveCount returns how many breaths of the window are positive.
func (d *AirTrapping) positiveCount() int {
	count := 0
	for i := range d.n {
		if d.ring[d.slot(i)].positive {
			count++
		}
	}
	return count
}

// putBuildUpEvidence adds to evidence the build-up and time-constant
// figures of the current breath cur: volume balance over the window,
// whether trapping is building up, end-expiratory flow, Te/τ, τ and the
// slope of the trapped-volume estimate.
func putBuildUpEvidence(evidence map[string]float64, cur *atBreath, balance, slope float64, building bool) {
	detPut(evidence, "balance_ml", balance, 1)
	if building {
		evidence["building_up"] = 1
	}
	detPut(evidence, "eef_lpm", cur.eefLPM, 2)
	detPut(evidence, "te_over_tau", cur.teOvTau, 3)
	detPut(evidence, "tau_s", cur.tauS, 3)
	detPut(evidence, "trapped_slope_ml_per_breath", slope, 1)
}

// grade sets the severity and message of a present finding from count
// positive breaths of the window and the median intrinsic PEEP and
// trapped volume of the positive breaths.
func (d *AirTrapping) grade(f *Finding, count int, peepi, trapped float64) {
	f.Severity = SeverityLow
	if peepi >= d.cfg.MediumPEEPiCmH2O || trapped >= d.cfg.MediumTrappedML {
		f.Severity = SeverityMedium
	}
	if peepi >= d.cfg.HighPEEPiCmH2O || trapped >= d.cfg.HighTrappedML {
		f.Severity = SeverityHigh
	}
	f.Message = fmt.Sprintf("expiratory flow has not returned to zero for %d of the last %d breaths", count, d.n)
	if !math.IsNaN(peepi) {
		f.Message += fmt.Sprintf("; intrinsic PEEP about %.1f cmH2O", peepi)
	}
	if !math.IsNaN(trapped) {
		f.Message += fmt.Sprintf(", trapped volume about %.0f mL", trapped)
	}
}

// predict adds the what-if of a present finding: the expiratory time at
// which the linear model's steady-state trapped volume falls below the
// target, the rate that gives it with its CO2 cost, and how many breaths
// of the window the single-compartment model cannot speak for.
func (d *AirTrapping) predict(f *Finding, cur *atBreath) {
	// What-if: the expiratory time at which the linear model's steady-state
	// trapped volume would fall below the target, Te = τ·ln(1 + VT/target),
	// and the rate that leaves it at the same inspiratory time.
	if cur.tauS > 0 && cur.vtML > 0 {
		te := TeForTrapped(cur.vtML, cur.tauS, d.cfg.TargetTrappedML)
		if !math.IsNaN(te) && !math.IsInf(te, 0) {
			tgt := fmt.Sprintf("%g", d.cfg.TargetTrappedML)
			f.Predict = map[string]float64{}
			detPut(f.Predict, "te_s_for_trapped_below_"+tgt+"ml", te, 2)
			if cur.tiS > 0 {
				rr := 60 / (cur.tiS + te)
				detPut(f.Predict, "rr_bpm_for_trapped_below_"+tgt+"ml", rr, 1)
				// Its CO2 cost at the same tidal volume and dead space
				// (alveolar ventilation equation, West JB, Respiratory
				// Physiology): PaCO2 scales with the old over the new rate.
				if old := 60 / (cur.tiS + cur.teS); rr > 0 && old > 0 {
					k := PaCO2Factor(old, cur.vtML, rr, cur.vtML, 0)
					detPut(f.Predict, "paco2_factor_at_rr_for_trapped_below_"+tgt+"ml", k, 2)
					if k > 1.05 {
						f.Message += fmt.Sprintf("; a rate of %.0f /min would leave under %s mL trapped but raise PaCO2 about %.1f-fold at the same tidal volume", rr, tgt, k)
					}
				}
			}
			if n := d.flaggedInWindow(); n > 0 {
				// The what-if assumes one linear, passive compartment.
				f.Predict["flagged_breaths"] = float64(n)
				f.Message += fmt.Sprintf("; %d of the last %d breaths are flagged (two time constants, effort or a non-linear expiration): the prediction is optimistic", n, d.n)
			}
		}
	}
}

// recentMedianPEEPi returns the median intrinsic PEEP estimate of the
// latest breath and up to two before it (NaN estimates left out; NaN when
// the latest has none).
func (d *AirTrapping) recentMedianPEEPi() float64 {
	cur := d.ring[d.slot(d.n-1)].peepi
	if math.IsNaN(cur) {
		return cur
	}
	var v [3]float64
	k := 0
	for i := d.n - 1; i >= 0 && i >= d.n-3; i-- {
		if p := d.ring[d.slot(i)].peepi; !math.IsNaN(p) {
			v[k] = p
			k++
		}
	}
	return detMedian(v[:k])
}

// flaggedInWindow counts the window's breaths whose estimates carry a
// flag that makes the single-compartment what-if unreliable.
func (d *AirTrapping) flaggedInWindow() int {
	n := 0
	for i := range d.n {
		if d.ring[d.slot(i)].flagged {
			n++
		}
	}
	return n
}

// atBreathOf condenses a breath record to what the detector keeps.
func atBreathOf(b *Breath) atBreath {
	cur := atBreath{
		seq:     b.Seq,
		eefLPM:  b.EndExpFlowLPM,
		peepi:   detFirstFinite(boundMagnitude(b), b.PEEPiCmH2O, b.PEEPiEEFCmH2O, b.PEEPiFitCmH2O),
		trapped: detFirstFinite(b.TrappedML, b.TrappedEEFML),
		teOvTau: b.TeOverTau,
		tauS:    b.TauS,
		teS:     b.TeS,
		tiS:     b.TiS,
		vtML:    detFirstFinite(b.VtiML, b.VteML),
		dVolML:  b.VtiML - b.VteML,
		flagged: b.HasFlag(FlagPEEPiBound) || b.HasFlag(FlagEffort) || b.HasFlag(FlagTauNonlinear),
	}
	if k := offsetShare(b); k != 1 {
		cur.peepi, cur.trapped = k*cur.peepi, k*cur.trapped
	}
	cur.trend = cur.trapped
	if k := inflowShare(b); k != 1 {
		cur.peepi, cur.trapped = k*cur.peepi, k*cur.trapped
	}
	if math.IsNaN(cur.teOvTau) && cur.tauS > 0 {
		cur.teOvTau = cur.teS / cur.tauS
	}
	return cur
}

// slot returns the ring index of the i-th oldest breath in the window.
func (d *AirTrapping) slot(i int) int {
	return (d.next - d.n + i + 2*d.cfg.M) % d.cfg.M
}

// buildUp returns the summed volume balance and the Theil–Sen slope of the
// trapped-volume estimate (mL per breath) over the window.
func (d *AirTrapping) buildUp() (balanceML, slope float64) {
	xs := make([]float64, 0, maxAirTrappingWindow)
	ys := make([]float64, 0, maxAirTrappingWindow)
	for i := range d.n {
		b := &d.ring[d.slot(i)]
		if !math.IsNaN(b.dVolML) {
			balanceML += b.dVolML
		}
		if !math.IsNaN(b.trend) {
			xs = append(xs, float64(i))
			ys = append(ys, b.trend)
		}
	}
	slope, d.buf = detTheilSen(xs, ys, d.buf[:0])
	return balanceML, slope
}

// positiveMedians returns the median intrinsic PEEP and trapped volume of
// the positive breaths in the window.
func (d *AirTrapping) positiveMedians() (peepi, trapped float64) {
	var p, v []float64
	for i := range d.n {
		b := &d.ring[d.slot(i)]
		if !b.positive {
			continue
		}
		if !math.IsNaN(b.peepi) {
			p = append(p, b.peepi)
		}
		if !math.IsNaN(b.trapped) {
			v = append(v, b.trapped)
		}
	}
	return detMedian(p), detMedian(v)
}

// detPut stores v rounded to prec decimals under key when it is finite;
// evidence never carries NaN (JSON has no NaN).
func detPut(m map[string]float64, key string, v float64, prec int) {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return
	}
	m[key] = detRound(v, prec)
}

// detRound rounds v to prec decimals.
func detRound(v float64, prec int) float64 {
	if math.Abs(v) > 1e12 || math.IsNaN(v) {
		return v // beyond any precision that matters, and v·p could overflow
	}
	p := math.Pow(10, float64(prec))
	return math.Round(v*p) / p
}
