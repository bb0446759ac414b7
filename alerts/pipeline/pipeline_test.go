package pipeline

import (
	"encoding/json"
	"math"
	"sort"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/simulator"
)

var epoch = time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)

func options(stream string) Options {
	return Options{Stream: stream, Analysis: analyze.DefaultConfig(), Detectors: analyze.DefaultDetectorConfig(),
		Alarms: alerts.DefaultLifecycleConfig()}
}

// trappingPatient is a passive patient on volume control whose expiration
// is too short for its time constant: R 25 cmH2O·s/L and C 60 mL/cmH2O give
// τ = R·C = 1.5 s; 600 mL at 45 L/min take Ti = 0.8 s, and at 24 /min
// Te = 2.5 − 0.8 = 1.7 s.
func trappingPatient() simulator.Scenario {
	return simulator.Steady{RCmH2OSPerL: 25, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45, RateBPM: 24, PEEPCmH2O: 5,
		DurationS: 120, SampleRateHz: 50}.Scenario()
}

// TestOfflineTrappedVolumeAndAlarm checks the pipeline's trapped volume
// against the steady-state closed form of the linear single-compartment
// model, x = exp(−Te/τ), V_trap = VT·x/(1−x) (Marini JJ, Crooke PS, Truwit
// JD, "Determinants and limits of pressure-preset ventilation: a
// mathematical model of pressure control", J Appl Physiol 1989;67:1081),
// and that the air-trapping alarm is raised.
func TestOfflineTrappedVolumeAndAlarm(t *testing.T) {
	ss, _, err := simulator.Run(trappingPatient())
	if err != nil {
		t.Fatal(err)
	}
	p := NewOffline(options("bed-1"), epoch)
	var out Output
	for _, s := range ss {
		p.PushOne(s, &out)
	}
	x := math.Exp(-1.7 / 1.5)
	want := 600 * x / (1 - x)
	var trapped []float64
	for _, b := range out.Breaths[len(out.Breaths)/2:] {
		trapped = append(trapped, b.TrappedML)
	}
	sort.Float64s(trapped)
	if got := trapped[len(trapped)/2]; math.Abs(got-want) > 0.2*want {
		t.Errorf("median trapped volume %.0f mL, want %.0f ± 20 %%", got, want)
	}
	raised := false
	for _, e := range out.Alerts {
		raised = raised || (e.Condition == analyze.CondAirTrapping && e.State == alerts.Raised)
	}
	if !raised {
		t.Fatalf("no air-trapping alarm raised in %d events", len(out.Alerts))
	}
}

// TestSnapshotRestore moves a pipeline's state through JSON into a new
// pipeline: the open alarms come across and can be acknowledged there.
func TestSnapshotRestore(t *testing.T) {
	ss, _, err := simulator.Run(trappingPatient())
	if err != nil {
		t.Fatal(err)
	}
	a := NewOffline(options("bed-2"), epoch)
	out := a.Samples(ss)
	if len(out.Alerts) == 0 {
		t.Fatal("no alert events to carry over")
	}
	data, err := json.Marshal(a.Snapshot())
	if err != nil {
		t.Fatal(err)
	}
	var st State
	if err := json.Unmarshal(data, &st); err != nil {
		t.Fatal(err)
	}
	if st.LastBreathSeq != out.Breaths[len(out.Breaths)-1].Seq {
		t.Errorf("snapshot last breath %d, want %d", st.LastBreathSeq, out.Breaths[len(out.Breaths)-1].Seq)
	}
	b := NewOffline(options("bed-2"), epoch)
	if err := b.Restore(st); err != nil {
		t.Fatal(err)
	}
	before, _ := json.Marshal(a.Alarms())
	after, _ := json.Marshal(b.Alarms())
	if string(before) != string(after) {
		t.Fatalf("alarms after restore differ:\n%s\n%s", before, after)
	}
	id := out.Alerts[len(out.Alerts)-1].ID
	ack, err := b.Ack(id, "tester", epoch.Add(time.Hour))
	if err != nil {
		t.Fatalf("ack on the restored pipeline: %v", err)
	}
	if len(ack.Alerts) == 0 || ack.Alerts[0].State != alerts.Acknowledged {
		t.Fatalf("ack events %+v, want one acknowledged", ack.Alerts)
	}
	if err := NewOffline(options("other"), epoch).Restore(st); err == nil {
		t.Error("restore into another stream's pipeline: want an error")
	}
}
