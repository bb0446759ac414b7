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
