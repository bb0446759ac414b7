package analyze

import (
	"math"
	"strings"
	"testing"
)

func TestConfigValidate(t *testing.T) {
	if errs := DefaultConfig().Validate("analysis"); len(errs) != 0 {
		t.Fatalf("default config invalid: %v", errs)
	}
	c := DefaultConfig()
	c.TriggerFlowLPM = 0
	c.HoldS = -1
	c.MinFitR2 = math.NaN()
	errs := c.Validate("streams[0].analysis")
	if len(errs) != 3 {
		t.Fatalf("got %d errors, want 3: %v", len(errs), errs)
	}
	for i, key := range []string{"trigger_flow_lpm", "hold_s", "min_fit_r2"} {
		msg := errs[i].Error()
		if !strings.HasPrefix(msg, "streams[0].analysis."+key+": ") || !strings.Contains(msg, "allowed") {
			t.Errorf("error %d = %q, want prefix streams[0].analysis.%s: and an allowed range", i, msg, key)
		}
	}
}

// TestConfigValidateCrossKeys checks the keys bounded by another key: the
// message names the key with its section and the key that bounds it.
func TestConfigValidateCrossKeys(t *testing.T) {
	for _, tc := range []struct {
		edit       func(*Config)
		key, other string
	}{
		{func(c *Config) { c.MinTriggerFlowLPM = 4 }, "min_trigger_flow_lpm", "trigger_flow_lpm"},
		{func(c *Config) { c.PlateauWindowS = 0.3 }, "plateau_window_s", "min_pause_s"},
	} {
		c := DefaultConfig()
		tc.edit(&c)
		errs := c.Validate("analysis")
		if len(errs) != 1 || !strings.HasPrefix(errs[0].Error(), "analysis."+tc.key+": ") || !strings.Contains(errs[0].Error(), tc.other) {
			t.Errorf("%s: %v, want one error naming analysis.%s and %s", tc.key, errs, tc.key, tc.other)
		}
	}
}
