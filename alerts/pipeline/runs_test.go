package pipeline

import (
	"encoding/json"
	"math"
	"testing"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
	"trapline/simulator"
)

// damaged returns the samples of the trapping patient with the faults the
// technical checks judge: a stretch of pressure far outside the physical
// range, a flat line, samples without a usable time, and a gap long
// enough to lose the signal.
func damaged(t *testing.T) []ingest.Sample {
	t.Helper()
	ss, _, err := simulator.Run(trappingPatient())
	if err != nil {
		t.Fatal(err)
	}
	var out []ingest.Sample
	for i, s := range ss {
		switch {
		case s.TimeS >= 20 && s.TimeS < 32:
			s.PressureCmH2O = 400 // out of range
		case s.TimeS >= 50 && s.TimeS < 75:
			s.PressureCmH2O, s.FlowLPS = 7, 0 // flat line
		case s.TimeS >= 90 && s.TimeS < 100:
			continue // a gap: signal lost, then arriving again
		}
		if i%997 == 0 {
			s.TimeS = math.NaN()
		}
		out = append(out, s)
	}
	return out
}

// TestOfflineRunsMatchOneByOne checks that an offline pipeline given its
// samples in runs, whose technical checks then take a run in one call,
// makes the same breath records and alert events, at the same times, as
// one given them one at a time: the detectors' windows shortened so that
// one run holds several of their findings.
func TestOfflineRunsMatchOneByOne(t *testing.T) {
	ss := damaged(t)
	opts := options("bed-3")
	opts.Detectors.Signal.WindowS = 0.3
	one := NewOffline(opts, epoch)
	var want Output
	for _, s := range ss {
		one.PushOne(s, &want)
	}
	implausible, lost := 0, 0
	for _, e := range want.Alerts {
		if e.State == alerts.Raised {
			implausible += b2i(e.Condition == analyze.CondSignalImplausible)
			lost += b2i(e.Condition == analyze.CondSignalLost)
		}
	}
	if implausible == 0 || lost == 0 || len(want.Breaths) < 20 {
		t.Fatalf("the damaged signal raised %d implausible and %d lost alarms over %d breaths: not a test of the checks",
			implausible, lost, len(want.Breaths))
	}
	for _, run := range []int{2, 7, 256, len(ss)} {
		p := NewOffline(opts, epoch)
		var got Output
		for i := 0; i < len(ss); i += run {
			p.Push(ss[i:min(i+run, len(ss))], &got)
		}
		if a, b := mustJSON(t, got), mustJSON(t, want); a != b {
			t.Fatalf("runs of %d: %d breaths and %d events, one at a time %d and %d; they differ",
				run, len(got.Breaths), len(got.Alerts), len(want.Breaths), len(want.Alerts))
		}
	}
}

func b2i(c bool) int {
	if c {
		return 1
	}
	return 0
}

func mustJSON(t *testing.T, v any) string {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}
