package cli

import (
	"bytes"
	"strings"
	"testing"

	"trapline/simulator"
)

// TestPredictVerb checks the table against check case 1 of docs/formulas.md (VT 0.6 L,
// R 25, C 60 mL/cmH2O, 24 /min, Ti 0.8 s, PEEP 5: trapped 285 mL, PEEPi 4.7,
// Pplat 19.7(5), Ppeak 38.5; derived from the linear model, closed form
// after Marini, Crooke, Truwit 1989) and case 6 (rate 24 → 12 at constant VT
// and dead space doubles PaCO2: alveolar ventilation equation, West,
// Respiratory Physiology).
func TestPredictVerb(t *testing.T) {
	var stdout, stderr bytes.Buffer
	code := Run(t.Context(), []string{"predict", "--r", "25", "--c", "60", "--vt", "600", "--flow", "45", "--rate", "24",
		"--peep", "5", "--cand-rate", "12"}, nil, &stdout, &stderr)
	if code != ExitOK {
		t.Fatalf("exit %d: %s", code, stderr.String())
	}
	out := stdout.String()
	for _, want := range []string{
		"MODEL PREDICTION", Caution,
		"current    600        45.0  0.80     0.00       24.0   5.0  1.70  1.13         285    4.7   19.7   38.5     14.40     1.00",
		"candidate    600        45.0  0.80     0.00       12.0   5.0  4.20  2.80          39    0.6   15.6   34.4      7.20     2.00",
		// Te for 50 mL: τ·ln(1 + VT/50) = 1.5·ln 13 = 3.85 s → 60/(0.8 + 3.85) = 12.9 /min.
		"rate for ≤ 50 mL    600        45.0  0.80     0.00       12.9",
	} {
		if !strings.Contains(out, want) {
			t.Errorf("output lacks %q:\n%s", want, out)
		}
	}
}

func TestPredictFromRecording(t *testing.T) {
	path := writeRecording(t, simulator.Steady{RCmH2OSPerL: 25, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45,
		RateBPM: 24, PEEPCmH2O: 5, SampleRateHz: 100, DurationS: 40})
	var stdout, stderr bytes.Buffer
	if code := Run(t.Context(), []string{"predict", "--from", path}, nil, &stdout, &stderr); code != ExitOK {
		t.Fatalf("exit %d: %s", code, stderr.String())
	}
	// The recording's medians reproduce the case 1 patient and settings.
	if out := stdout.String(); !strings.Contains(out, "τ 1.50 s (median of the reliable breaths") ||
		!strings.Contains(out, "current    598        45.0  0.80     0.00       24.0   5.0  1.70") {
		t.Errorf("unexpected output:\n%s", out)
	}
}

func TestPredictBadUsage(t *testing.T) {
	for _, args := range [][]string{
		{"predict", "--vt", "500", "--flow", "40", "--rate", "20"},                           // no R, C
		{"predict", "--r", "10", "--c", "50", "--vt", "500", "--flow", "10", "--rate", "30"}, // Ti 3 s > cycle
		{"predict", "--r", "10", "--c", "50", "--vt", "500", "--flow", "40", "--rate", "20", "--target-trapped", "0"},
		// An impossible candidate is refused before any table is printed.
		{"predict", "--r", "25", "--c", "60", "--vt", "600", "--flow", "45", "--rate", "24", "--peep", "5", "--cand-rate", "0,-5"},
		{"predict", "--r", "10", "--c", "50", "--vt", "500", "--flow", "40", "--rate", "20", "--cand-rate", "12,200"}, // Ti longer than the cycle
	} {
		var stdout, stderr bytes.Buffer
		if code := Run(t.Context(), args, nil, &stdout, &stderr); code != ExitUsage {
			t.Errorf("%v: exit %d, want %d (%s)", args, code, ExitUsage, stderr.String())
		}
		if stdout.Len() != 0 {
			t.Errorf("%v: printed %q", args, stdout.String())
		}
	}
}
