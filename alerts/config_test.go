package alerts

import (
	"strings"
	"testing"

	"trapline/analyze"
)

func TestDefaultLifecycleConfigIsValid(t *testing.T) {
	c := DefaultLifecycleConfig()
	if errs := c.Validate("alarms"); len(errs) != 0 {
		t.Fatalf("defaults invalid: %v", errs)
	}
}

func TestLifecycleConfigFor(t *testing.T) {
	c := DefaultLifecycleConfig()
	c.Conditions.AirTrapping.Latching = ptr(true)
	at := c.For(analyze.CondAirTrapping)
	if !at.Latching || at.ClearBreaths != c.Default.ClearBreaths {
		t.Errorf("air-trapping: %+v, want latching with the default clear_breaths", at)
	}
	if got := c.For(analyze.CondHighPeakPressure).DelayBreaths; got != 1 {
		t.Errorf("high-peak-pressure delay_breaths %d, want the built-in override 1", got)
	}
	if got := c.For(analyze.CondSignalLost).Priority; got != string(Medium) {
		t.Errorf("signal-lost priority %q, want medium", got)
	}
	if got := c.For("no-such-condition"); got != c.Default {
		t.Errorf("unknown condition %+v, want the default", got)
	}
	// Every condition the detectors report has an override slot.
	for _, cond := range analyze.Conditions() {
		if c.override(cond) == nil {
			t.Errorf("condition %s has no override key", cond)
		}
	}
}

func TestLifecycleConfigValidate(t *testing.T) {
	tests := []struct {
		name   string
		change func(*LifecycleConfig)
		want   []string
	}{
		{"default clear zero", func(c *LifecycleConfig) { c.Default.ClearBreaths = 0 }, []string{"alarms.default.clear_breaths: must be between 1 and 10000"}},
		{"override bad priority", func(c *LifecycleConfig) { c.Conditions.AirTrapping.Priority = ptr("urgent") },
			[]string{`alarms.conditions.air_trapping.priority: unknown priority "urgent" (want high, medium, low or empty for the finding's severity)`}},
		{"override negative delay", func(c *LifecycleConfig) { c.Conditions.SignalLost.DelayS = ptr(-1.0) }, []string{"alarms.conditions.signal_lost.delay_s: must be between 0 and 86400"}},
		{"negative ack expiry", func(c *LifecycleConfig) { c.Default.AckExpiryS = -5 }, []string{"alarms.default.ack_expiry_s: must be between 0 (until cleared) and 86400"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			c := DefaultLifecycleConfig()
			tt.change(&c)
			var got []string
			for _, e := range c.Validate("alarms") {
				got = append(got, e.Error())
			}
			if strings.Join(got, "\n") != strings.Join(tt.want, "\n") {
				t.Errorf("errors:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(tt.want, "\n"))
			}
		})
	}
}
