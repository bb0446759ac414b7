package cli

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"trapline/ingest"
	"trapline/simulator"
)

// TestAnalyzeWorkersSameOutput analyses a ward recording of three
// patients interleaved on one file (text with the stream column, and the
// binary framing), one of whom traps air, on one goroutine and with
// --workers 1 (decoding and analysis on two): the output is the same byte
// for byte, alert events included, from a file and from stdin.
func TestAnalyzeWorkersSameOutput(t *testing.T) {
	var scs []simulator.Scenario
	for k, r := range []float64{10, 25, 12} {
		scs = append(scs, simulator.Steady{RCmH2OSPerL: r, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45,
			RateBPM: 16 + 4*float64(k), PEEPCmH2O: 5, SampleRateHz: 100, DurationS: 90}.Scenario())
	}
	scs, err := simulator.WardScenarios(scs, 3, "bed")
	if err != nil {
		t.Fatal(err)
	}
	for _, format := range []ingest.Format{ingest.FormatText, ingest.FormatBinary} {
		var sims []*simulator.Sim
		for _, sc := range scs {
			s, err := simulator.New(sc)
			if err != nil {
				t.Fatal(err)
			}
			sims = append(sims, s)
		}
		var rec bytes.Buffer
		if _, err := simulator.StreamWard(t.Context(), sims, simulator.WriterOutput(&rec), simulator.WardOptions{Format: format}); err != nil {
			t.Fatal(err)
		}
		path := filepath.Join(t.TempDir(), "ward.rec")
		if err := os.WriteFile(path, rec.Bytes(), 0o600); err != nil {
			t.Fatal(err)
		}
		analyse := func(args ...string) string {
			t.Helper()
			var stdout, stderr bytes.Buffer
			in := bytes.NewReader(rec.Bytes())
			if code := Run(t.Context(), append([]string{"analyze", "--log-level", "error"}, args...), in, &stdout, &stderr); code != ExitOK {
				t.Fatalf("%v: exit %d: %s", args, code, stderr.String())
			}
			return stdout.String()
		}
		want := analyse(path)
		if n := strings.Count(want, `"type":"breath"`); n < 60 || !strings.Contains(want, `"condition":"air-trapping"`) ||
			!strings.Contains(want, `"stream":"bed-3"`) {
			t.Fatalf("%s: %d breath records, an air-trapping event %v: not a ward with a trapping patient", format, n,
				strings.Contains(want, `"condition":"air-trapping"`))
		}
		for _, args := range [][]string{{"--workers", "1", path}, {"--workers", "1", "-"}} {
			if got := analyse(args...); got != want {
				t.Errorf("%s %v: the output differs from one goroutine's (%d and %d bytes)", format, args, len(got), len(want))
			}
		}
	}
	var stdout, stderr bytes.Buffer
	if code := Run(t.Context(), []string{"analyze", "--workers", "2", "-"}, strings.NewReader(""), &stdout, &stderr); code != ExitUsage ||
		!strings.Contains(stderr.String(), "--workers 2") {
		t.Errorf("--workers 2: exit %d, %q; want a usage error naming the flag", code, stderr.String())
	}
}
