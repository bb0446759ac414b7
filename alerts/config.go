package alerts

import (
	"fmt"

	"trapline/analyze"
)

// ConditionConfig is the lifecycle of one alarm condition. Evaluations are
// the detector's findings: one per breath for breath detectors, one per
// check for technical ones. Times are stream seconds (Finding.TimeS), except
// AckExpiryS, which runs on the wall clock that acknowledgements come with.
type ConditionConfig struct {
	// Enabled: a disabled condition never raises.
	Enabled bool `mapstructure:"enabled"`
	// DelayBreaths is the alarm condition delay in evaluations: the
	// condition must be present on this many further consecutive
	// evaluations after the first before it is raised (0 raises at once).
	DelayBreaths int `mapstructure:"delay_breaths"`
	// DelayS is the alarm condition delay in seconds of continuous presence
	// (both delays must have passed).
	DelayS float64 `mapstructure:"delay_s"`
	// ClearBreaths is the clearing hysteresis: the condition must be absent
	// on this many consecutive evaluations (at least 1) before it clears.
	ClearBreaths int `mapstructure:"clear_breaths"`
	// ClearS is the clearing hysteresis in seconds of continuous absence.
	ClearS float64 `mapstructure:"clear_s"`
	// Latching keeps the alarm after its condition is gone until someone
	// acknowledges it.
	Latching bool `mapstructure:"latching"`
	// EscalateAfterS raises the priority one level when the condition has
	// persisted this long without acknowledgement since it was raised or
	// last escalated; 0 disables escalation by persistence (worsening
	// severity always escalates).
	EscalateAfterS float64 `mapstructure:"escalate_after_s"`
	// AckExpiryS is how long an acknowledgement holds; after it the alarm
	// is announced again if the condition is still present. 0 means it
	// holds until the condition clears.
	AckExpiryS float64 `mapstructure:"ack_expiry_s"`
	// Priority fixes the priority ("high", "medium" or "low"); empty takes
	// it from the finding's severity.
	Priority string `mapstructure:"priority"`
}

// Override changes some fields of ConditionConfig for one condition; a nil
// field keeps the value of LifecycleConfig.Default.
type Override struct {
	Enabled        *bool    `mapstructure:"enabled"`
	DelayBreaths   *int     `mapstructure:"delay_breaths"`
	DelayS         *float64 `mapstructure:"delay_s"`
	ClearBreaths   *int     `mapstructure:"clear_breaths"`
	ClearS         *float64 `mapstructure:"clear_s"`
	Latching       *bool    `mapstructure:"latching"`
	EscalateAfterS *float64 `mapstructure:"escalate_after_s"`
	AckExpiryS     *float64 `mapstructure:"ack_expiry_s"`
	Priority       *string  `mapstructure:"priority"`
}

// Overrides holds one Override per condition. It is a struct rather than a
// map so that a misspelt condition is an unknown key under strict decoding.
type Overrides struct {
	AirTrapping         Override `mapstructure:"air_trapping"`
	RisingPeakPressure  Override `mapstructure:"rising_peak_pressure"`
	HighPeakPressure    Override `mapstructure:"high_peak_pressure"`
	HighPlateauPressure Override `mapstructure:"high_plateau_pressure"`
	HighDrivingPressure Override `mapstructure:"high_driving_pressure"`
	SignalLost          Override `mapstructure:"signal_lost"`
	SignalImplausible   Override `mapstructure:"signal_implausible"`
	SampleGaps          Override `mapstructure:"sample_gaps"`
	DecoderErrors       Override `mapstructure:"decoder_errors"`
}

// LifecycleConfig is the `alarms:` section of the configuration: the
// lifecycle every condition gets, and per-condition overrides.
type LifecycleConfig struct {
	Default    ConditionConfig `mapstructure:"default"`
	Conditions Overrides       `mapstructure:"conditions"`
}

// DefaultLifecycleConfig returns the defaults. The numbers are our choice
// unless a comment names a source; the detectors already demand persistence
// (N of M breaths, trend windows), so the delays here are short.
func DefaultLifecycleConfig() LifecycleConfig {
	return LifecycleConfig{
		Default: ConditionConfig{
			Enabled: true,
			// Clear after 3 absent evaluations: hysteresis against a
			// condition flickering around its threshold.
			ClearBreaths: 3,
			// Re-escalate an unanswered alarm after 5 minutes, and let an
			// acknowledgement hold 2 minutes (the order of magnitude of an
			// "audio paused" interval in IEC 60601-1-8; common practice).
			EscalateAfterS: 300,
			AckExpiryS:     120,
		},
		Conditions: Overrides{
			// Absolute limits: two consecutive breaths, so that a single
			// cough does not raise.
			HighPeakPressure:    Override{DelayBreaths: ptr(1)},
			HighPlateauPressure: Override{DelayBreaths: ptr(1)},
			HighDrivingPressure: Override{DelayBreaths: ptr(1)},
			// Technical conditions are evaluated about once a second and
			// have their own time limits; losing the signal means losing
			// monitoring, so its priority is fixed at medium and it clears
			// as soon as samples flow again.
			SignalLost:        Override{ClearBreaths: ptr(1), Priority: ptr(string(Medium))},
			SignalImplausible: Override{DelayS: ptr(5.0), ClearS: ptr(5.0)},
			SampleGaps:        Override{ClearS: ptr(30.0)},
			DecoderErrors:     Override{ClearS: ptr(30.0)},
		},
	}
}

func ptr[T any](v T) *T { return &v }

// For returns the effective configuration of a condition: Default with the
// condition's override applied. An unknown condition gets Default.
func (c *LifecycleConfig) For(condition string) ConditionConfig {
	out := c.Default
	o := c.override(condition)
	if o == nil {
		return out
	}
	if o.Enabled != nil {
		out.Enabled = *o.Enabled
	}
	if o.DelayBreaths != nil {
		out.DelayBreaths = *o.DelayBreaths
	}
	if o.DelayS != nil {
		out.DelayS = *o.DelayS
	}
	if o.ClearBreaths != nil {
		out.ClearBreaths = *o.ClearBreaths
	}
	if o.ClearS != nil {
		out.ClearS = *o.ClearS
	}
	if o.Latching != nil {
		out.Latching = *o.Latching
	}
	if o.EscalateAfterS != nil {
		out.EscalateAfterS = *o.EscalateAfterS
	}
	if o.AckExpiryS != nil {
		out.AckExpiryS = *o.AckExpiryS
	}
	if o.Priority != nil {
		out.Priority = *o.Priority
	}
	return out
}

// overrideKeys ties each condition name to its configuration key.
var overrideKeys = []struct {
	condition, key string
	get            func(*Overrides) *Override
}{
	{analyze.CondAirTrapping, "air_trapping", func(o *Overrides) *Override { return &o.AirTrapping }},
	{analyze.CondRisingPeakPressure, "rising_peak_pressure", func(o *Overrides) *Override { return &o.RisingPeakPressure }},
	{analyze.CondHighPeakPressure, "high_peak_pressure", func(o *Overrides) *Override { return &o.HighPeakPressure }},
	{analyze.CondHighPlateauPressure, "high_plateau_pressure", func(o *Overrides) *Override { return &o.HighPlateauPressure }},
	{analyze.CondHighDrivingPressure, "high_driving_pressure", func(o *Overrides) *Override { return &o.HighDrivingPressure }},
	{analyze.CondSignalLost, "signal_lost", func(o *Overrides) *Override { return &o.SignalLost }},
	{analyze.CondSignalImplausible, "signal_implausible", func(o *Overrides) *Override { return &o.SignalImplausible }},
	{analyze.CondSampleGaps, "sample_gaps", func(o *Overrides) *Override { return &o.SampleGaps }},
	{analyze.CondDecoderErrors, "decoder_errors", func(o *Overrides) *Override { return &o.DecoderErrors }},
}

func (c *LifecycleConfig) override(condition string) *Override {
	for _, k := range overrideKeys {
		if k.condition == condition {
			return k.get(&c.Conditions)
		}
	}
	return nil
}

// Validate reports every invalid value at once, each prefixed with its full
// key path, e.g. "alarms.conditions.air_trapping.clear_breaths: must be at
// least 1". A bad value in default is reported once, under default, not
// again for every condition that inherits it.
func (c *LifecycleConfig) Validate(prefix string) []error {
	join := func(key string) string {
		if prefix == "" {
			return key
		}
		return prefix + "." + key
	}
	errs := validateCondition(join("default"), c.Default)
	for _, k := range overrideKeys {
		o := k.get(&c.Conditions)
		eff := c.For(k.condition)
		for _, err := range validateCondition(join("conditions."+k.key), eff) {
			if overrideSets(o, err.field) {
				errs = append(errs, err)
			}
		}
	}
	out := make([]error, len(errs))
	for i, e := range errs {
		out[i] = e
	}
	return out
}

// fieldError is a configuration error that remembers its field name, so
// that Validate can tell an override's own error from an inherited one.
type fieldError struct {
	path, field, msg string
}

func (e fieldError) Error() string { return e.path + "." + e.field + ": " + e.msg }

func validateCondition(path string, c ConditionConfig) []fieldError {
	var errs []fieldError
	bad := func(field, format string, args ...any) {
		errs = append(errs, fieldError{path: path, field: field, msg: fmt.Sprintf(format, args...)})
	}
	if c.DelayBreaths < 0 || c.DelayBreaths > 10000 {
		bad("delay_breaths", "must be between 0 and 10000")
	}
	if !(c.DelayS >= 0 && c.DelayS <= 86400) {
		bad("delay_s", "must be between 0 and 86400")
	}
	if c.ClearBreaths < 1 || c.ClearBreaths > 10000 {
		bad("clear_breaths", "must be between 1 and 10000")
	}
	if !(c.ClearS >= 0 && c.ClearS <= 86400) {
		bad("clear_s", "must be between 0 and 86400")
	}
	if !(c.EscalateAfterS >= 0 && c.EscalateAfterS <= 86400) {
		bad("escalate_after_s", "must be between 0 (never) and 86400")
	}
	if !(c.AckExpiryS >= 0 && c.AckExpiryS <= 86400) {
		bad("ack_expiry_s", "must be between 0 (until cleared) and 86400")
	}
	switch Priority(c.Priority) {
	case "", High, Medium, Low:
	default:
		bad("priority", "unknown priority %q (want high, medium, low or empty for the finding's severity)", c.Priority)
	}
	return errs
}

// overrideSets reports whether o sets the named field.
func overrideSets(o *Override, field string) bool {
	switch field {
	case "enabled":
		return o.Enabled != nil
	case "delay_breaths":
		return o.DelayBreaths != nil
	case "delay_s":
		return o.DelayS != nil
	case "clear_breaths":
		return o.ClearBreaths != nil
	case "clear_s":
		return o.ClearS != nil
	case "latching":
		return o.Latching != nil
	case "escalate_after_s":
		return o.EscalateAfterS != nil
	case "ack_expiry_s":
		return o.AckExpiryS != nil
	case "priority":
		return o.Priority != nil
	}
	return false
}
