package analyze

// Class says whether a condition concerns the patient or the equipment, in
// the sense of IEC 60601-1-8 (physiological and technical alarm conditions).
type Class string

const (
	// Physiological conditions concern the patient (air trapping, pressures).
	Physiological Class = "physiological"
	// Technical conditions concern the signal chain (signal lost, gaps).
	Technical Class = "technical"
)

// Severity grades how bad a present condition is. The alarm lifecycle in
// package alerts maps it to an IEC 60601-1-8 priority and escalates when it
// rises.
type Severity int

const (
	// SeverityNone means the condition is absent.
	SeverityNone Severity = iota
	// SeverityLow calls for awareness.
	SeverityLow
	// SeverityMedium calls for a prompt response.
	SeverityMedium
	// SeverityHigh calls for an immediate response.
	SeverityHigh
)

// String names the severity.
func (s Severity) String() string {
	switch s {
	case SeverityLow:
		return "low"
	case SeverityMedium:
		return "medium"
	case SeverityHigh:
		return "high"
	default:
		return "none"
	}
}

// Finding is one detector's verdict on one condition at one moment: whether
// the condition is present, how severe it is, and the evidence. Detectors
// emit a finding for every evaluation, present or not, so that the lifecycle
// can apply its delays and hysteresis.
type Finding struct {
	// Condition is the condition's name, e.g. "air-trapping".
	Condition string
	Class     Class
	// Present is true when the detector's criteria hold now.
	Present  bool
	Severity Severity
	// TimeS is the stream time of the evaluation (seconds, sample clock).
	TimeS float64
	// BreathSeq is the breath that was evaluated, or -1 for findings not tied
	// to a breath (technical conditions).
	BreathSeq int
	// Evidence holds the numbers behind the verdict, keyed with units in
	// the name (e.g. "eef_lpm", "peepi_cmh2o").
	Evidence map[string]float64
	// Message says in plain words why, e.g. "expiratory flow has not
	// returned to zero for 5 of the last 6 breaths".
	Message string
	// Predict holds what-if predictions that help resolve the condition,
	// e.g. "te_s_for_trapped_below_50ml"; nil when none apply.
	Predict map[string]float64
}
