package tests

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"regexp"
	"testing"
	"time"

	"trapline/daemon/cli"
)

// updateGoldenEnv regenerates the golden files of TestAnalyzeGolden when set
// to 1. An intentional change to the analysis (breath records or alert
// events) regenerates them on purpose, and the diff of the golden files shows
// a reviewer what changed; so does a change to the simulator, which writes
// the input. Any other change must leave them byte-identical.
const updateGoldenEnv = "TRAPLINE_UPDATE_GOLDEN"

// goldenCases are shipped scenarios, cut short and sampled at 50 Hz so the
// test stays quick, each with a fixed noise seed: the same seed gives the
// same bytes, so the input is fixed.
var goldenCases = []struct{ scenario, duration string }{
	{"bronchospasm", "240s"},
	{"hyperinflation", "240s"},
	{"disconnect", "240s"},
	{"noisy", "180s"},
}

// TestAnalyzeGolden feeds simulated recordings through `trapline analyze`,
// the command's real code path, and compares its NDJSON output (breath
// records and alert events) byte for byte with files in testdata/golden.
// It guards the behaviour of the analysis while the code around it moves.
func TestAnalyzeGolden(t *testing.T) {
	update := os.Getenv(updateGoldenEnv) == "1"
	for _, tc := range goldenCases {
		t.Run(tc.scenario, func(t *testing.T) {
			ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
			defer cancel()
			var rec, out, stderr bytes.Buffer
			if code := cli.Run(ctx, []string{"sim", "--scenario", tc.scenario, "--speed", "max",
				"--duration", tc.duration, "--seed", "7", "--sample-rate", "50", "--log-level", "error"},
				nil, &rec, &stderr); code != cli.ExitOK {
				t.Fatalf("sim exit %d: %s", code, stderr.String())
			}
			if code := cli.Run(ctx, []string{"analyze", "--log-level", "error", "-"},
				bytes.NewReader(rec.Bytes()), &out, &stderr); code != cli.ExitOK {
				t.Fatalf("analyze exit %d: %s", code, stderr.String())
			}
			// The program version depends on the build; the golden files
			// hold "dev" in its place.
			got := versionField.ReplaceAll(out.Bytes(), []byte(`"trapline_version":"dev"`))
			out.Reset()
			out.Write(got)
			path := filepath.Join("testdata", "golden", tc.scenario+".ndjson")
			if update {
				if err := os.WriteFile(path, out.Bytes(), 0o644); err != nil {
					t.Fatalf("write golden: %v", err)
				}
				return
			}
			want, err := os.ReadFile(path)
			if err != nil {
				t.Fatalf("read golden (regenerate with %s=1): %v", updateGoldenEnv, err)
			}
			if !bytes.Equal(out.Bytes(), want) {
				t.Fatalf("analyze output differs from %s (%d bytes, want %d); first difference at line %d",
					path, out.Len(), len(want), firstDiffLine(out.Bytes(), want))
			}
		})
	}
}

// versionField matches the trapline_version field of a record.
var versionField = regexp.MustCompile(`"trapline_version":"[^"]*"`)

// firstDiffLine returns the 1-based line number where a and b first differ.
func firstDiffLine(a, b []byte) int {
	line := 1
	for i := 0; i < len(a) && i < len(b); i++ {
		if a[i] != b[i] {
			return line
		}
		if a[i] == '\n' {
			line++
		}
	}
	return line
}
