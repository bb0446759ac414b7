package analyze

import (
	"fmt"
	"math"
)

// Limits checks each breath against absolute pressure limits: peak pressure,
// plateau pressure (ARDS Network, NEJM 2000;342:1301) and driving pressure,
// plateau minus total PEEP (Amato MBP et al., NEJM 2015;372:747). A present
// limit goes absent only below the limit minus its hysteresis, so a value
// hovering at the limit does not flicker.
type Limits struct {
	cfg     LimitsConfig
	present [3]bool
	// below holds the message of each limit when absent, which depends
	// on the configuration only: made once rather than formatted for
	// every breath.
	below [3]string
}

var _ BreathDetector = (*Limits)(nil)

// NewLimits returns the absolute-limit detector; cfg must be valid.
func NewLimits(cfg LimitsConfig) *Limits {
	d := &Limits{cfg: cfg}
	for i, l := range d.limits() {
		d.below[i] = fmt.Sprintf("%s below the limit of %g cmH2O", l.name, l.cfg.LimitCmH2O)
	}
	return d
}

// Conditions implements BreathDetector.
func (d *Limits) Conditions() []string {
	var out []string
	for i, l := range d.limits() {
		if l.cfg.Enabled {
			out = append(out, limitConds[i])
		}
	}
	return out
}

// Reset implements BreathDetector.
func (d *Limits) Reset() { d.present = [3]bool{} }

var limitConds = [3]string{CondHighPeakPressure, CondHighPlateauPressure, CondHighDrivingPressure}

type limitSpec struct {
	cfg  *LimitConfig
	name string // what the value is, for messages
	key  string // evidence key of the value
}

func (d *Limits) limits() [3]limitSpec {
	return [3]limitSpec{
		{&d.cfg.HighPeak, "peak pressure", "pip_cmh2o"},
		{&d.cfg.HighPlateau, "plateau pressure", "pplat_cmh2o"},
		{&d.cfg.HighDriving, "driving pressure", "driving_cmh2o"},
	}
}

// Breath implements BreathDetector.
func (d *Limits) Breath(b *Breath, dst []Finding) []Finding {
	t := detFirstFinite(b.EndS, b.StartS)
	// Total PEEP: set (measured end-expiratory) PEEP plus the intrinsic PEEP
	// estimate when there is one (derived).
	peepTot := b.PEEPCmH2O
	if b.PEEPiCmH2O > 0 {
		peepTot += b.PEEPiCmH2O
	}
	plat, estimated := b.PlateauCmH2O, false
	if math.IsNaN(plat) && d.cfg.EstimateWithoutPause && b.FitR2 >= d.cfg.MinFitR2 && b.CMLPerCmH2O > 0 {
		// Without a pause, the fit gives Pplat = total PEEP + VT/C
		// (equation of motion at end-inspiration, zero flow; Bates 2009).
		if vt := detFirstFinite(b.VtiML, b.VteML); vt > 0 && !math.IsNaN(peepTot) {
			plat, estimated = peepTot+vt/b.CMLPerCmH2O, true
		}
	}
	values := [3]float64{b.PeakCmH2O, plat, plat - peepTot}
	if estimated && slowEndBound(b) {
		// The intrinsic PEEP of a slow end is only a bound, and so is the
		// total PEEP an estimated plateau stands on: no plateau from it.
		// The estimated driving pressure, VT/C, does not depend on it.
		values[1] = math.NaN()
	}
	for i, l := range d.limits() {
		if !l.cfg.Enabled {
			continue
		}
		v := values[i]
		f := Finding{Condition: limitConds[i], Class: Physiological, TimeS: t, BreathSeq: b.Seq,
			Evidence: map[string]float64{"limit_cmh2o": l.cfg.LimitCmH2O}}
		detPut(f.Evidence, l.key, v, 2)
		if i > 0 && estimated {
			f.Evidence["estimated"] = 1
		}
		if i == 2 {
			detPut(f.Evidence, "pplat_cmh2o", plat, 2)
			detPut(f.Evidence, "peep_total_cmh2o", peepTot, 2)
		}
		switch {
		case math.IsNaN(v) || b.HasFlag("artifact"):
			// Unknown: keep the verdict rather than clear on a gap.
			f.Present = d.present[i]
		case d.present[i]:
			f.Present = v >= l.cfg.LimitCmH2O-l.cfg.HysteresisCmH2O
		default:
			f.Present = v >= l.cfg.LimitCmH2O
		}
		d.present[i] = f.Present
		if f.Present {
			f.Severity = SeverityMedium
			if v >= l.cfg.LimitCmH2O+l.cfg.HighMarginCmH2O {
				f.Severity = SeverityHigh
			}
		}
		switch {
		case math.IsNaN(v):
			f.Message = l.name + " unknown on this breath; verdict unchanged"
		case f.Present:
			f.Message = fmt.Sprintf("%s %.1f cmH2O at or above the limit of %g cmH2O", l.name, v, l.cfg.LimitCmH2O)
		default:
			f.Message = d.below[i]
		}
		if estimated && i > 0 && !math.IsNaN(v) {
			f.Message += " (estimated from the fit, no pause)"
		}
		dst = append(dst, f)
	}
	return dst
}
