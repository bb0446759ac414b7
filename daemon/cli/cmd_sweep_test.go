package cli

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// tinySweepGrid is a grid file that runs in a second or two.
const tinySweepGrid = `duration: 3m
models: [linear]
resistance_cmh2o_s_per_l: [35]
compliance_ml_per_cmh2o: [50]
settings:
  - {name: vt600-rr24, mode: vc, tidal_volume_ml: 600, flow_lpm: 40, rate_bpm: 24, peep_cmh2o: 5}
noise:
  - {name: clean, pressure_noise_cmh2o: 0.1, flow_noise_lpm: 0.3}
scenarios: []
`

// TestSweepVerb runs the verb on a tiny grid with a comparison config and
// checks its outputs: the JSON summary holds both sets, the report is
// written, and the headline goes to stdout.
func TestSweepVerb(t *testing.T) {
	dir := t.TempDir()
	grid := filepath.Join(dir, "grid.yaml")
	other := filepath.Join(dir, "quick.yaml")
	out := filepath.Join(dir, "out")
	if err := os.WriteFile(grid, []byte(tinySweepGrid), 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(other, []byte("detectors:\n  air_trapping:\n    n: 2\n    m: 3\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	var stdout, stderr bytes.Buffer
	code := Run(t.Context(), []string{"sweep", "--grid", grid, "--compare", other, "-o", out}, nil, &stdout, &stderr)
	if code != ExitOK {
		t.Fatalf("exit %d: %s", code, stderr.String())
	}
	var sum struct {
		Type     string `json:"type"`
		Patients int    `json:"patients"`
		Sets     []struct {
			Name string `json:"name"`
		} `json:"sets"`
	}
	data, err := os.ReadFile(filepath.Join(out, "summary.json"))
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(data, &sum); err != nil {
		t.Fatal(err)
	}
	if sum.Type != "sweep-summary" || sum.Patients != 1 || len(sum.Sets) != 2 || sum.Sets[1].Name != "quick" {
		t.Errorf("summary %+v", sum)
	}
	if fi, err := os.Stat(filepath.Join(out, "report.html")); err != nil || fi.Size() < 10000 {
		t.Errorf("report: %v", err)
	}
	if !strings.Contains(stdout.String(), "air-trapping") || !strings.Contains(stdout.String(), "report: ") {
		t.Errorf("stdout %q lacks the headline", stdout.String())
	}
}

func TestSweepUsage(t *testing.T) {
	dir := t.TempDir()
	bad := filepath.Join(dir, "bad.yaml")
	if err := os.WriteFile(bad, []byte("models: [balloon]\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	badCfg := filepath.Join(dir, "bad-config.yaml")
	if err := os.WriteFile(badCfg, []byte("detectors:\n  air_trapping:\n    n: 9\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"--quick", "--grid", bad}, "exclude"},
		{[]string{"--grid", bad}, "balloon"},
		{[]string{"--grid", filepath.Join(dir, "missing.yaml")}, "missing.yaml"},
		{[]string{"--quick", "--compare", badCfg}, "air_trapping.n"},
		{[]string{"--workers", "-1"}, "--workers"},
	} {
		t.Run(strings.Join(c.args, " "), func(t *testing.T) {
			var stdout, stderr bytes.Buffer
			code := Run(t.Context(), append([]string{"sweep", "-o", filepath.Join(dir, "out")}, c.args...), nil, &stdout, &stderr)
			if code != ExitUsage {
				t.Fatalf("exit %d, want %d; stderr %s", code, ExitUsage, stderr.String())
			}
			if !strings.Contains(stderr.String(), c.want) {
				t.Errorf("stderr %q does not mention %q", stderr.String(), c.want)
			}
		})
	}
}
