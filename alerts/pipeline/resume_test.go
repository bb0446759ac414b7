package pipeline

import (
	"encoding/json"
	"fmt"
	"strings"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/ingest"
	"trapline/simulator"
)

// liveRun feeds ss to a live pipeline whose wall clock is epoch + the
// sample's stream time, as a device streaming in real time would.
func liveRun(p *Pipeline, clock *time.Time, ss []ingest.Sample, out *Output) {
	for _, s := range ss {
		*clock = epoch.Add(time.Duration(s.TimeS * float64(time.Second)))
		p.PushOne(s, out)
	}
}

func livePipeline(stream string, clock *time.Time) *Pipeline {
	o := options(stream)
	o.Now = func() time.Time { return *clock }
	o.KeepBreaths = KeepBreaths(o.Detectors)
	return New(o)
}

func eventKeys(evs []alerts.Event) []string {
	var k []string
	for _, e := range evs {
		k = append(k, fmt.Sprintf("%s %s %s %.3f", e.ID, e.State, e.Priority, e.TS))
	}
	return k
}

// checkpointJSON takes a checkpoint through JSON, as the daemon's file does.
func checkpointJSON(t *testing.T, p *Pipeline, now time.Time, clean bool) Checkpoint {
	t.Helper()
	data, err := json.Marshal(p.Checkpoint(now, clean))
	if err != nil {
		t.Fatal(err)
	}
	var cp Checkpoint
	if err := json.Unmarshal(data, &cp); err != nil {
		t.Fatal(err)
	}
	return cp
}

// TestResumeShortGapContinues stops a pipeline halfway through an
// air-trapping episode and resumes a new one from the checkpoint: on the
// second half it makes exactly the events and breath numbers the pipeline
// that never stopped makes, so the detectors' windows and the alarms came
// across whole.
func TestResumeShortGapContinues(t *testing.T) {
	ss, _, err := simulator.Run(trappingPatient())
	if err != nil {
		t.Fatal(err)
	}
	half := len(ss) / 2
	var clock time.Time
	whole := livePipeline("bed-3", &clock)
	var first, wantSecond Output
	liveRun(whole, &clock, ss[:half], &first)
	cp := checkpointJSON(t, whole, clock, true)
	liveRun(whole, &clock, ss[half:], &wantSecond)

	clock = cp.SavedAt
	resumed := livePipeline("bed-3", &clock)
	out, err := resumed.Resume(cp, clock, DefaultMaxGap)
	if err != nil {
		t.Fatal(err)
	}
	if len(out.Alerts) != 1 || out.Alerts[0].Condition != alerts.CondMonitoringGap {
		t.Fatalf("resume events %v, want only the monitoring-gap event", eventKeys(out.Alerts))
	}
	if len(resumed.Alarms().Alarms) == 0 || len(first.Alerts) == 0 {
		t.Fatal("no alarm open at the checkpoint: the test does not test continuity")
	}
	var gotSecond Output
	liveRun(resumed, &clock, ss[half:], &gotSecond)
	if g, w := strings.Join(eventKeys(gotSecond.Alerts), "\n"), strings.Join(eventKeys(wantSecond.Alerts), "\n"); g != w {
		t.Errorf("events after resume:\n%s\nwant (never stopped):\n%s", g, w)
	}
	// The breath open at the checkpoint is lost and the analyzer needs
	// one more to find the phase again (it waits for a start of
	// inspiration): at most two breaths fewer.
	if g, w := len(gotSecond.Breaths), len(wantSecond.Breaths); g < w-2 || g > w {
		t.Fatalf("%d breaths after resume, want %d (at most 2 fewer)", g, w)
	}
	for i := 1; i < len(gotSecond.Breaths); i++ {
		if gotSecond.Breaths[i].Seq != gotSecond.Breaths[i-1].Seq+1 {
			t.Fatalf("breath numbers after resume not consecutive at %d", i)
		}
	}
	if g, w := gotSecond.Breaths[0].Seq, first.Breaths[len(first.Breaths)-1].Seq+1; g != w {
		t.Errorf("first breath after resume numbered %d, want %d (no repeat)", g, w)
	}
}

// TestResumeLongGapEndsAlarms resumes after more than the longest gap: every
// alarm left open gets an "ended" event, the gap is reported with its
// interval, and an acknowledgement of an ended id says what became of it.
func TestResumeLongGapEndsAlarms(t *testing.T) {
	p, clock, ss, open := trappingHalf(t, "bed-4")
	cp := checkpointJSON(t, p, clock, false)
	later := clock.Add(2 * DefaultMaxGap)
	q := livePipeline("bed-4", &later)
	out, err := q.Resume(cp, later, DefaultMaxGap)
	if err != nil {
		t.Fatal(err)
	}
	var gap *alerts.Event
	for i, e := range out.Alerts {
		switch {
		case e.Condition == alerts.CondMonitoringGap:
			gap = &out.Alerts[i]
		case e.State == alerts.Ended && e.Reason == alerts.ReasonInterrupted:
			if e.TS < cp.State.LastS-1e-9 {
				t.Errorf("%s ended at t_s %.3f, before the last sample %.3f", e.ID, e.TS, cp.State.LastS)
			}
			delete(open, e.ID)
		default:
			t.Errorf("unexpected event %s %s", e.ID, e.State)
		}
		if err := e.Validate(); err != nil {
			t.Error(err)
		}
	}
	if len(open) != 0 {
		t.Errorf("alarms left without a terminal event: %v", open)
	}
	if gap == nil || !gap.GapFrom.Equal(cp.SavedAt) || !gap.GapTo.Equal(later) {
		t.Fatalf("gap event %+v, want from %v to %v", gap, cp.SavedAt, later)
	}
	if len(q.judge.Lifecycle().Active()) != 0 {
		t.Error("alarms still active after they ended")
	}
	var more Output
	liveRun(q, &later, ss[len(ss)/2:], &more)
	if len(more.Breaths) == 0 || more.Breaths[0].Seq < cp.SeqReserved || cp.SeqReserved <= cp.State.LastBreathSeq {
		t.Errorf("after a checkpoint that was not clean, breaths resume at %d, want at the reserved %d (> last %d)",
			more.Breaths[0].Seq, cp.SeqReserved, cp.State.LastBreathSeq)
	}
	id := out.Alerts[0].ID
	_, err = q.Ack(id, "nurse", later)
	if err == nil || !strings.Contains(err.Error(), "ended") || !strings.Contains(err.Error(), alerts.ReasonInterrupted) {
		t.Errorf("ack of ended %s: %v, want it to say it ended: monitoring interrupted", id, err)
	}
}

// TestEndAlarmsAtStop ends the open alarms of a trapping patient as a
// stream that keeps no checkpoint does when it stops: one valid ended
// event per open alarm with reason "monitoring stopped", not earlier in
// stream time than the last sample, none left active, and an
// acknowledgement of an ended id says what became of it.
func TestEndAlarmsAtStop(t *testing.T) {
	p, clock, _, open := trappingHalf(t, "bed-6")
	lastS := p.Snapshot().LastS
	out := p.EndAlarms(clock, alerts.ReasonStopped)
	for _, e := range out.Alerts {
		if e.State != alerts.Ended || e.Reason != alerts.ReasonStopped || !open[e.ID] {
			t.Errorf("event %s %s reason %q, want an open alarm ended: %s", e.ID, e.State, e.Reason, alerts.ReasonStopped)
		}
		if e.TS < lastS-1e-9 {
			t.Errorf("%s ended at t_s %.3f, before the last sample %.3f", e.ID, e.TS, lastS)
		}
		if err := e.Validate(); err != nil {
			t.Error(err)
		}
		delete(open, e.ID)
	}
	if len(open) != 0 || len(p.Active()) != 0 {
		t.Errorf("alarms left open: %v, active %d", open, len(p.Active()))
	}
	if len(out.Alerts) > 0 {
		id := out.Alerts[0].ID
		if _, err := p.Ack(id, "nurse", clock); err == nil || !strings.Contains(err.Error(), alerts.ReasonStopped) {
			t.Errorf("ack of ended %s: %v, want it to say it ended: %s", id, err, alerts.ReasonStopped)
		}
	}
}

// trappingHalf runs the first half of the trapping patient through a live
// pipeline of stream and returns it, its wall clock, all the patient's
// samples and the ids of the alarms open at that point (at least one).
func trappingHalf(t *testing.T, stream string) (*Pipeline, time.Time, []ingest.Sample, map[string]bool) {
	t.Helper()
	ss, _, err := simulator.Run(trappingPatient())
	if err != nil {
		t.Fatal(err)
	}
	var clock time.Time
	p := livePipeline(stream, &clock)
	var first Output
	liveRun(p, &clock, ss[:len(ss)/2], &first)
	open := map[string]bool{}
	for _, e := range p.Active() {
		open[e.ID] = true
	}
	if len(open) == 0 {
		t.Fatal("no alarm open half way")
	}
	return p, clock, ss, open
}
