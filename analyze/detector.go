package analyze

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
