package sweep

import (
	"strings"
	"testing"
)

// TestGridErrorsNameTheKey checks that grid mistakes are told by key path,
// with the nearest known key (inline ventilator fields included).
func TestGridErrorsNameTheKey(t *testing.T) {
	for _, tc := range []struct {
		yaml string
		want string
	}{
		{"modles: [linear]\n", `line 1: modles: unknown key (did you mean "models"?)`},
		{"settings:\n  - name: a\n    rate_bmp: 12\n", `line 3: settings[0].rate_bmp: unknown key (did you mean "rate_bpm"?)`},
		{"settings:\n  - name: a\n    rate_bpm: x\n", `line 3: settings[0].rate_bpm: want a number, got "x"`},
	} {
		_, err := ParseGrid([]byte(tc.yaml))
		if err == nil || !strings.Contains(err.Error(), tc.want) || strings.Contains(err.Error(), "simulator.") {
			t.Errorf("%q:\n got %v\nwant %s", tc.yaml, err, tc.want)
		}
	}
}

// The grid files shipped in docs/ load, expand and have the size their
// comments and docs/sweep.md give.
func TestShippedGridsExpand(t *testing.T) {
	for _, tc := range []struct {
		file     string
		patients int
	}{
		{"../../docs/sweep-acceptance.yaml", 4 * 4 * 6 * 5 * 3},      // models × R × settings × noise × rates
		{"../../docs/sweep-specificity.yaml", 4 * 3 * 6 * 5 * 3 * 2}, // the same × 2 seeds, R 5–10
	} {
		g, err := LoadGrid(tc.file)
		if err != nil {
			t.Fatalf("%s: %v", tc.file, err)
		}
		p, err := g.Expand()
		if err != nil {
			t.Fatalf("%s: %v", tc.file, err)
		}
		if len(p.Cases) != tc.patients {
			t.Errorf("%s: %d patients, want %d", tc.file, len(p.Cases), tc.patients)
		}
	}
}
