package alarmbook

import (
	"testing"
	"time"

	"trapline/alerts"
	"trapline/analyze"
)

// lifecycleEvents drives a real alarm lifecycle (default configuration)
// through the state machine of docs/detectors.md: present findings once a
// second with the given severity, an acknowledgement at ackS, and absent
// findings from clearS on. It returns the events in order.
func lifecycleEvents(t *testing.T, sev func(tS float64) analyze.Severity, ackS, clearS, endS float64) []alerts.Event {
	t.Helper()
	l := alerts.NewLifecycle("bed-1", alerts.DefaultLifecycleConfig())
	epoch := time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)
	var out []alerts.Event
	for ts := 0.0; ts <= endS; ts++ {
		wall := epoch.Add(time.Duration(ts) * time.Second)
		f := analyze.Finding{Condition: "air-trapping", Class: analyze.Physiological, TimeS: ts, BreathSeq: int(ts),
			Present: ts < clearS, Severity: sev(ts), Message: "test"}
		out = append(out, l.Update(f, wall)...)
		if ts == ackS {
			act := l.Active()
			if len(act) != 1 {
				t.Fatalf("at %g s: %d active alarms, want 1", ts, len(act))
			}
			evs, err := l.Ack(act[0].ID, wall)
			if err != nil {
				t.Fatal(err)
			}
			out = append(out, evs...)
		}
	}
	return out
}

// TestBookFollowsOneAlarm: whatever ids the lifecycle issues (a second
// escalation and a re-announcement after an acknowledgement both start a
// new id that supersedes the old one, docs/detectors.md), the book sees one
// alarm, and its priority moves only up.
func TestBookFollowsOneAlarm(t *testing.T) {
	low := func(float64) analyze.Severity { return analyze.SeverityLow }
	rising := func(ts float64) analyze.Severity {
		switch {
		case ts < 10:
			return analyze.SeverityLow
		case ts < 20:
			return analyze.SeverityMedium
		}
		return analyze.SeverityHigh
	}
	cases := []struct {
		name          string
		sev           func(float64) analyze.Severity
		ackS, clearS  float64
		endS          float64
		wantKinds     []Kind
		wantIDs       int
		wantOpen      bool
		wantPriority  alerts.Priority
		wantSegments  int
		wantEscalated int // alarms escalated, not escalations
	}{
		// raised low → escalated medium (same id) → escalated high (new id,
		// supersedes) → cleared.
		{"worsening", rising, -1, 30, 40, []Kind{Raised, Escalated, Escalated, Cleared}, 2, false, alerts.High, 3, 1},
		// raised → acknowledged → the acknowledgement expires after 120 s
		// with the condition still present: announced again (new id) →
		// still open at the end.
		{"ack expires", low, 5, 1000, 130, []Kind{Raised, Acknowledged, Repeated}, 2, true, alerts.Low, 1, 0},
		// A condition present for longer than escalate_after_s (300 s)
		// without acknowledgement goes one level up, then clears.
		{"persistence", low, -1, 320, 330, []Kind{Raised, Escalated, Cleared}, 1, false, alerts.Medium, 2, 1},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			b := New()
			var kinds []Kind
			for _, ev := range lifecycleEvents(t, c.sev, c.ackS, c.clearS, c.endS) {
				kinds = append(kinds, b.Apply(&ev).Kind)
				if again := b.Apply(&ev); again.Kind != Duplicate {
					t.Errorf("event %s applied twice: %v, want Duplicate", ev.DedupID(), again.Kind)
				}
			}
			if len(kinds) != len(c.wantKinds) {
				t.Fatalf("kinds %v, want %v", kinds, c.wantKinds)
			}
			for i := range kinds {
				if kinds[i] != c.wantKinds[i] {
					t.Fatalf("kinds %v, want %v", kinds, c.wantKinds)
				}
			}
			if n := len(b.Alarms()); n != 1 {
				t.Fatalf("%d alarms, want 1", n)
			}
			a := b.Alarms()[0]
			if len(a.IDs) != c.wantIDs || a.Open != c.wantOpen || a.Priority != c.wantPriority {
				t.Errorf("alarm ids %v open %v priority %s; want %d ids, open %v, %s", a.IDs, a.Open, a.Priority, c.wantIDs, c.wantOpen, c.wantPriority)
			}
			if n := len(a.Segments(c.endS)); n != c.wantSegments {
				t.Errorf("%d segments %+v, want %d", n, a.Segments(c.endS), c.wantSegments)
			}
			per, total := b.Summary()
			if len(per) != 1 || total.Alarms != 1 || total.Escalated != c.wantEscalated || (total.Open == 1) != c.wantOpen || total.Open+total.Cleared != 1 {
				t.Errorf("summary %+v total %+v", per, total)
			}
		})
	}
}

// TestSegmentsCoverTheSpan: the segments of an alarm tile its span from the
// raise to the clearing without gap or overlap.
func TestSegmentsCoverTheSpan(t *testing.T) {
	a := &Alarm{Steps: []Step{{TS: 10, Kind: Raised, Priority: alerts.Low}, {TS: 15, Kind: Escalated, Priority: alerts.Medium},
		{TS: 15, Kind: Acknowledged, Priority: alerts.Medium}, {TS: 30, Kind: Escalated, Priority: alerts.High}, {TS: 42, Kind: Cleared, Priority: alerts.High}}}
	segs := a.Segments(100)
	want := []Segment{{10, 15, alerts.Low}, {15, 30, alerts.Medium}, {30, 42, alerts.High}}
	if len(segs) != len(want) {
		t.Fatalf("segments %+v, want %+v", segs, want)
	}
	for i := range want {
		if segs[i] != want[i] {
			t.Errorf("segment %d: %+v, want %+v", i, segs[i], want[i])
		}
	}
	a.Open = true
	if s := a.Segments(100); s[len(s)-1].ToS != 100 {
		t.Errorf("open alarm ends at %g, want 100", s[len(s)-1].ToS)
	}
}

// TestUnknownStateChangesNothing: an event whose state is not one of the
// contract's four adds no alarm.
func TestUnknownStateChangesNothing(t *testing.T) {
	b := New()
	if ch := b.Apply(&alerts.Event{ID: "x", Condition: "c", State: "exploded"}); ch.Kind != Duplicate || len(b.Alarms()) != 0 {
		t.Errorf("unknown state: %v, %d alarms", ch.Kind, len(b.Alarms()))
	}
}
