package alerts

import (
	"encoding/json"
	"fmt"
	"math"
	"testing"
	"time"

	"trapline/analyze"
)

// stateFindings is a made-up stretch of one stream: air trapping present
// for a while (raise, escalation by worsening, a second escalation that
// starts a new raise), then absent (clear); a plateau alarm that is
// acknowledged in the middle; NaN evidence that JSON cannot carry.
func stateFindings() []analyze.Finding {
	var fs []analyze.Finding
	for i := range 120 {
		t := float64(i) * 3
		at := analyze.Finding{Condition: analyze.CondAirTrapping, Class: analyze.Physiological,
			Present: i >= 5 && i < 80, Severity: analyze.SeverityLow, TimeS: t, BreathSeq: i,
			Evidence: map[string]float64{"eef_lpm": 12, "bad": math.NaN()}, Message: "flow does not return to zero"}
		if i >= 30 {
			at.Severity = analyze.SeverityMedium
		}
		if i >= 60 {
			at.Severity = analyze.SeverityHigh
		}
		pl := analyze.Finding{Condition: analyze.CondHighPlateauPressure, Class: analyze.Physiological,
			Present: i >= 10 && i < 100, Severity: analyze.SeverityMedium, TimeS: t, BreathSeq: i,
			Evidence: map[string]float64{"plateau_cmh2o": 33}, Message: "plateau above 30"}
		fs = append(fs, at, pl)
	}
	return fs
}

// run feeds fs to l from index from on, with wall time 1 s per stream
// second and an acknowledgement of the plateau alarm at index ackAt.
func runFindings(t *testing.T, l *Lifecycle, fs []analyze.Finding, from, ackAt int) []Event {
	t.Helper()
	epoch := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
	var out []Event
	for i := from; i < len(fs); i++ {
		wall := epoch.Add(time.Duration(fs[i].TimeS * float64(time.Second)))
		out = append(out, l.Update(fs[i], wall)...)
		if i == ackAt {
			for _, ev := range l.Active() {
				if ev.Condition == analyze.CondHighPlateauPressure {
					evs, err := l.AckBy(ev.ID, "nurse-7", wall)
					if err != nil {
						t.Fatal(err)
					}
					out = append(out, evs...)
				}
			}
		}
	}
	return out
}

// TestLifecycleSnapshotRestore checks that a lifecycle stopped anywhere,
// stored as JSON and restored elsewhere, goes on with exactly the events
// (ids, states, priorities) of the one that was never stopped: what a new
// owner of a stream relies on.
func TestLifecycleSnapshotRestore(t *testing.T) {
	fs := stateFindings()
	cfg := DefaultLifecycleConfig()
	const ackAt = 70
	whole := runFindings(t, NewLifecycle("bed-3", cfg), fs, 0, ackAt)
	if len(whole) < 5 {
		t.Fatalf("the made-up stretch makes only %d events", len(whole))
	}
	for _, split := range []int{1, 11, 40, 61, 71, 130, 170, 201, 239} {
		t.Run(fmt.Sprint("split-", split), func(t *testing.T) {
			a := NewLifecycle("bed-3", cfg)
			first := runFindings(t, a, fs[:split], 0, ackAt)
			data, err := MarshalState(a.Snapshot())
			if err != nil {
				t.Fatal(err)
			}
			var st LifecycleState
			if err := json.Unmarshal(data, &st); err != nil {
				t.Fatal(err)
			}
			b, err := RestoreLifecycle("bed-3", cfg, st)
			if err != nil {
				t.Fatal(err)
			}
			rest := runFindings(t, b, fs, split, ackAt)
			got := append(first, rest...)
			if len(got) != len(whole) {
				t.Fatalf("split at %d: %d events, uninterrupted %d", split, len(got), len(whole))
			}
			for i := range got {
				g, w := got[i], whole[i]
				if g.ID != w.ID || g.State != w.State || g.Priority != w.Priority || g.Supersedes != w.Supersedes || g.TS != w.TS {
					t.Errorf("split at %d, event %d: %s %s %s, uninterrupted %s %s %s", split, i,
						g.ID, g.State, g.Priority, w.ID, w.State, w.Priority)
				}
			}
		})
	}
}

// TestRestoreLifecycleRefuses checks the snapshots that cannot be restored.
func TestRestoreLifecycleRefuses(t *testing.T) {
	cfg := DefaultLifecycleConfig()
	for _, tc := range []struct {
		name string
		st   LifecycleState
	}{
		{"other stream", LifecycleState{Stream: "bed-9"}},
		{"unknown phase", LifecycleState{Alarms: []AlarmState{{Condition: "air-trapping", Phase: 7}}}},
		{"repeated condition", LifecycleState{Alarms: []AlarmState{{Condition: "air-trapping"}, {Condition: "air-trapping"}}}},
		{"empty condition", LifecycleState{Alarms: []AlarmState{{}}}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if _, err := RestoreLifecycle("bed-1", cfg, tc.st); err == nil {
				t.Error("restored without error")
			}
		})
	}
}
