package analyze

import "trapline/ingest"

// Condition names reported in Finding.Condition and in alert events. They
// are part of the alert event contract: never rename one.
const (
	CondAirTrapping         = "air-trapping"
	CondRisingPeakPressure  = "rising-peak-pressure"
	CondHighPeakPressure    = "high-peak-pressure"
	CondHighPlateauPressure = "high-plateau-pressure"
	CondHighDrivingPressure = "high-driving-pressure"
	CondSignalLost          = "signal-lost"
	CondSignalImplausible   = "signal-implausible"
	CondSampleGaps          = "sample-gaps"
	CondDecoderErrors       = "decoder-errors"
)

// Conditions lists every condition name the detectors can report, in a
// fixed order.
func Conditions() []string {
	return []string{
		CondAirTrapping, CondRisingPeakPressure, CondHighPeakPressure, CondHighPlateauPressure,
		CondHighDrivingPressure, CondSignalLost, CondSignalImplausible, CondSampleGaps, CondDecoderErrors,
	}
}

// BreathDetector turns completed breath records into findings. A detector
// keeps bounded history (fixed windows) and is a deterministic function of
// the breaths it has seen: no clock, no I/O.
type BreathDetector interface {
	// Conditions names the conditions the detector reports.
	Conditions() []string
	// Breath evaluates breath b and appends one finding per condition to
	// dst, present or not, so that the alarm lifecycle can time its delays
	// and hysteresis.
	Breath(b *Breath, dst []Finding) []Finding
	// Reset forgets the history, e.g. after a disconnection.
	Reset()
}

// Detectors runs every enabled detector of one stream: the breath
// detectors on each completed breath and the technical ones on samples,
// status events, decoder counters and clock ticks.
type Detectors struct {
	breath []BreathDetector
	signal *Signal // nil when disabled
}

// NewDetectors returns the enabled detectors of cfg; cfg must be valid.
func NewDetectors(cfg DetectorConfig) *Detectors {
	d := &Detectors{}
	if cfg.AirTrapping.Enabled {
		d.breath = append(d.breath, NewAirTrapping(cfg.AirTrapping))
	}
	if cfg.RisingPeak.Enabled {
		d.breath = append(d.breath, NewRisingPeak(cfg.RisingPeak))
	}
	if l := cfg.Limits; l.HighPeak.Enabled || l.HighPlateau.Enabled || l.HighDriving.Enabled {
		d.breath = append(d.breath, NewLimits(cfg.Limits))
	}
	if cfg.Signal.Enabled {
		d.signal = NewSignal(cfg.Signal)
	}
	return d
}

// Breath runs the breath detectors on b and appends their findings to dst.
func (d *Detectors) Breath(b *Breath, dst []Finding) []Finding {
	for _, det := range d.breath {
		dst = det.Breath(b, dst)
	}
	return dst
}

// Samples passes a batch of samples that arrived at nowS to the technical
// detector (see Signal.Samples).
func (d *Detectors) Samples(samples []ingest.Sample, nowS float64, dst []Finding) []Finding {
	if d.signal == nil {
		return dst
	}
	return d.signal.Samples(samples, nowS, dst)
}

// Status passes a source status event to the technical detector.
func (d *Detectors) Status(ev *ingest.Event, nowS float64) {
	if d.signal != nil {
		d.signal.Status(ev.Status, ev.GapS, ev.Err, nowS)
	}
}

// Decoder passes the change of the source's counters to the technical
// detector.
func (d *Detectors) Decoder(delta ingest.Stats, nowS float64) {
	if d.signal != nil {
		d.signal.Decoder(delta, nowS)
	}
}

// Tick evaluates the time-based technical conditions at nowS.
func (d *Detectors) Tick(nowS float64, dst []Finding) []Finding {
	if d.signal == nil {
		return dst
	}
	return d.signal.Tick(nowS, dst)
}

// Reset forgets the history of the breath detectors, e.g. after the
// analyzer was reset on a disconnection; technical state is kept.
func (d *Detectors) Reset() {
	for _, det := range d.breath {
		det.Reset()
	}
}
