package cli

import (
	"bytes"
	"regexp"
	"strings"
	"testing"
)

// The demo's default scenario (bronchospasm: air trapping that settings
// changes then resolve) played at 200× speed through the whole daemon ends
// with a summary that counts alarms and says none is still open; the demo
// prints the live view's address and keeps its caution lines; every line of
// the plain view fits 80 columns.
func TestDemoDefaultScenarioEndsWithNoOpenAlarm(t *testing.T) {
	if testing.Short() {
		t.Skip("plays 18 simulated minutes through the daemon (about 10 s)")
	}
	var stdout, stderr bytes.Buffer
	if code := Run(t.Context(), []string{"demo", "--speed", "200", "--plain"}, nil, &stdout, &stderr); code != ExitOK {
		t.Fatalf("demo: exit %d: %s\n%s", code, stderr.String(), stdout.String())
	}
	out := stdout.String()
	if !regexp.MustCompile(`demo: live view in your browser at http://127\.0\.0\.1:\d+/live/`).MatchString(out) {
		t.Errorf("no live view address in the output:\n%s", out)
	}
	if n := strings.Count(out, Caution); n != 2 {
		t.Errorf("caution printed %d times, want at the start and the end", n)
	}
	sum := out[strings.LastIndex(out, "demo: finished after"):]
	// The total line, in the long or the short wording of tui.SummaryLines.
	total := regexp.MustCompile(`(?m)^all +(\d+) alarms?: .*$`).FindStringSubmatch(sum)
	if total == nil {
		t.Fatalf("no total line in the summary:\n%s", sum)
	}
	count := func(what string) string {
		m := regexp.MustCompile(`(\d+) ` + what + `\b|` + what + ` (\d+)`).FindStringSubmatch(total[0])
		if m == nil {
			t.Fatalf("total line %q does not count %s", total[0], what)
		}
		return m[1] + m[2]
	}
	if count("open") != "0" || count("cleared") != total[1] || total[1] == "0" {
		t.Errorf("summary total %q: want some alarms, all cleared, 0 open", total[0])
	}
	if !strings.Contains(sum, "air-trapping") {
		t.Errorf("the default scenario raised no air-trapping alarm:\n%s", sum)
	}
	for _, l := range strings.Split(out, "\n") {
		if l != Caution && len([]rune(l)) > 80 {
			t.Errorf("line wider than 80 columns: %q", l)
		}
	}
	t.Logf("%s", sum)
}
