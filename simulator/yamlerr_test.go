package simulator

import (
	"strings"
	"testing"
)

// TestScenarioErrorsNameTheKey checks that scenario mistakes are told by
// key path, with the nearest known key, and without Go type names.
func TestScenarioErrorsNameTheKey(t *testing.T) {
	for _, tc := range []struct {
		yaml string
		want string
	}{
		{"patient:\n  resistanse: 10\n", `line 2: patient.resistanse: unknown key (did you mean "resistance_cmh2o_s_per_l"?)`},
		{"ventilator:\n  rate_bpm: fast\n", `line 2: ventilator.rate_bpm: want a number, got "fast"`},
		{"sampel_rate_hz: 100\n", `line 1: sampel_rate_hz: unknown key (did you mean "sample_rate_hz"?)`},
		{"timeline:\n  - at: 10s\n    patient: {x: 1}\n    evnt: disconnect\n", `line 4: timeline[0].evnt: unknown key (did you mean "event"?)`},
	} {
		_, err := ParseScenario([]byte(tc.yaml))
		if err == nil {
			t.Errorf("%q: no error", tc.yaml)
			continue
		}
		if !strings.Contains(err.Error(), tc.want) || strings.Contains(err.Error(), "simulator.") || strings.Contains(err.Error(), "float64") {
			t.Errorf("%q:\n got %v\nwant %s", tc.yaml, err, tc.want)
		}
	}
}
