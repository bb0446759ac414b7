package cli

import (
	"bufio"
	"bytes"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"trapline/analyze"
	"trapline/ingest"
	"trapline/simulator"
)

// writeRecording simulates a steady passive patient and writes it in the
// sample line format v1.
func writeRecording(t *testing.T, st simulator.Steady) string {
	t.Helper()
	sim, err := simulator.New(st.Scenario())
	if err != nil {
		t.Fatal(err)
	}
	enc, err := ingest.NewTextEncoder(ingest.TextEncoderOptions{})
	if err != nil {
		t.Fatal(err)
	}
	buf := append([]byte(nil), enc.Header()...)
	for {
		s, ok := sim.Next()
		if !ok {
			break
		}
		buf = enc.Append(buf, "", s)
	}
	path := filepath.Join(t.TempDir(), "rec.csv")
	if err := os.WriteFile(path, buf, 0o600); err != nil {
		t.Fatal(err)
	}
	return path
}

// TestAnalyzeVerb runs `trapline analyze` on a simulated recording of
// check case 1 of docs/formulas.md (derived) (VT 0.6 L, R 25, C 0.06 L/cmH2O, 24 /min, square flow
// 45 L/min, PEEP 5) and checks the NDJSON records against the closed form of
// the linear single-compartment model: steady-state trapped volume 285 mL
// and intrinsic PEEP 4.75 cmH2O (Marini, Crooke, Truwit, J Appl Physiol
// 1989, analogous closed form; derived).
func TestAnalyzeVerb(t *testing.T) {
	path := writeRecording(t, simulator.Steady{RCmH2OSPerL: 25, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45,
		RateBPM: 24, PEEPCmH2O: 5, SampleRateHz: 200, DurationS: 60})
	var stdout, stderr bytes.Buffer
	if code := Run(t.Context(), []string{"analyze", path}, nil, &stdout, &stderr); code != ExitOK {
		t.Fatalf("exit %d: %s", code, stderr.String())
	}
	sc := bufio.NewScanner(&stdout)
	var bs []analyze.Breath
	trapAlert := false
	for sc.Scan() {
		if bytes.Contains(sc.Bytes(), []byte(`"type":"alert"`)) {
			// Alert events interleave with the breaths; this patient traps
			// (4.75 cmH2O), so the air-trapping alert must be among them.
			trapAlert = trapAlert || bytes.Contains(sc.Bytes(), []byte(`"condition":"air-trapping","class":"physiological","priority":"low","state":"raised"`))
			continue
		}
		var b analyze.Breath
		if err := json.Unmarshal(sc.Bytes(), &b); err != nil {
			t.Fatalf("line %q: %v", sc.Text(), err)
		}
		bs = append(bs, b)
	}
	// 60 s at 24 /min: cycles start every 2.5 s. The one at t = 0 has no
	// expiration before it and is not seen; the one at 57.5 s never
	// completes: the breaths starting at 2.5 … 55 s remain.
	if len(bs) != 22 {
		t.Fatalf("%d breaths, want 22", len(bs))
	}
	if !trapAlert {
		t.Errorf("no air-trapping alert raised for a patient with an intrinsic PEEP of 4.75 cmH2O")
	}
	last := bs[len(bs)-1]
	if math.Abs(last.TrappedML-285) > 5 || math.Abs(last.PEEPiCmH2O-4.75) > 0.1 || math.Abs(last.RateBPM-24) > 0.01 {
		t.Errorf("last breath trapped %.1f mL, PEEPi %.2f, rate %.3f; want 285, 4.75, 24", last.TrappedML, last.PEEPiCmH2O, last.RateBPM)
	}

	stdout.Reset()
	in := strings.NewReader(mustRead(t, path))
	if code := Run(t.Context(), []string{"analyze", "--summary", "-"}, in, &stdout, &stderr); code != ExitOK {
		t.Fatalf("summary: exit %d: %s", code, stderr.String())
	}
	out := stdout.String()
	if !strings.Contains(out, "median") || !strings.Contains(out, "22 breaths, 22 reliable") || !strings.Contains(out, Caution) {
		t.Errorf("summary lacks the median row or the caution:\n%s", out)
	}
}

func mustRead(t *testing.T, path string) string {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

// TestAnalyzeBadInput checks that bad input gives a clear error or no
// breaths, never a crash.
func TestAnalyzeBadInput(t *testing.T) {
	dir := t.TempDir()
	write := func(name string, data []byte) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, data, 0o600); err != nil {
			t.Fatal(err)
		}
		return p
	}
	random := make([]byte, 4096)
	for i := range random {
		random[i] = byte(i*7919 + i*i)
	}
	var flat strings.Builder
	flat.WriteString("time[s],pressure[cmH2O],flow[L/min]\n")
	for i := 0; i < 60000; i++ { // ten minutes at 100 Hz
		flat.WriteString(strconv.FormatFloat(float64(i)/100, 'f', 2, 64) + ",5.0,0.0\n")
	}
	// A headerless file whose columns are pressure, flow, time: read as
	// time, pressure, flow, its "times" go up and down with the breaths.
	var reo strings.Builder
	for i := 0; i < 3000; i++ {
		p := 5 + 10*math.Sin(float64(i)/50)
		reo.WriteString(strconv.FormatFloat(p, 'f', 3, 64) + ",0.0," + strconv.FormatFloat(float64(i)/100, 'f', 2, 64) + "\n")
	}
	reordered := reo.String()
	tests := []struct {
		name     string
		args     []string
		code     int
		stderr   string
		noStdout bool
		stdout   string // when set, a part of the expected output
	}{
		{"empty file", []string{"analyze", write("empty.csv", nil)}, ExitError, "no samples", true, ""},
		{"random bytes", []string{"analyze", write("random.bin", random)}, ExitError, "no samples", true, ""},
		{"missing file", []string{"analyze", filepath.Join(dir, "nope.csv")}, ExitError, "open input", true, ""},
		{"header only", []string{"analyze", write("head.csv", []byte("time[s],pressure[cmH2O],flow[L/min]\n"))}, ExitError,
			"no samples after its header", true, ""},
		{"every line bad", []string{"analyze", write("bad.csv", []byte("a;b;c\nd;e;f\n"))}, ExitError,
			"with the columns assumed \"time[s],pressure[cmH2O],flow[L/min]\"", true, ""},
		{"flat line", []string{"analyze", write("flat.csv", []byte(flat.String()))}, ExitOK, "no complete breath", false,
			`"condition":"signal-implausible","class":"technical","priority":"medium","state":"raised"`},
		{"bad columns", []string{"analyze", "--columns", "time[fortnight],flow", write("x.csv", []byte("1,2\n"))}, ExitUsage, "columns", true, ""},
		{"columns out of order", []string{"analyze", write("reordered.csv", []byte(reordered))}, ExitError,
			"not in time order", true, ""},
		{"no argument", []string{"analyze"}, ExitUsage, "give a recording file, a recording directory or - for stdin", true, ""},
		{"bad format", []string{"analyze", "--format", "csv", "-"}, ExitUsage, "want auto, text, binary or recording", true, ""},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var stdout, stderr bytes.Buffer
			code := Run(t.Context(), tt.args, nil, &stdout, &stderr)
			if code != tt.code {
				t.Fatalf("exit %d, want %d; stderr %s", code, tt.code, stderr.String())
			}
			if !strings.Contains(stderr.String(), tt.stderr) {
				t.Errorf("stderr %q does not mention %q", stderr.String(), tt.stderr)
			}
			if tt.noStdout && stdout.Len() != 0 {
				t.Errorf("stdout: %q", stdout.String())
			}
			if !strings.Contains(stdout.String(), tt.stdout) {
				t.Errorf("stdout lacks %s: %q", tt.stdout, stdout.String())
			}
		})
	}
}
