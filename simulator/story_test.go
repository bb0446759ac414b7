package simulator

import (
	"testing"
)

// truthAt returns the ground truth of the breath in progress at time t.
func truthAt(t *testing.T, truths []Truth, at float64) Truth {
	t.Helper()
	for _, tr := range truths {
		if tr.StartS <= at && at < tr.EndS {
			return tr
		}
	}
	t.Fatalf("no breath at %g s", at)
	return Truth{}
}

func runShipped(t *testing.T, name string) (Scenario, []Truth) {
	t.Helper()
	sc, err := Shipped(name)
	if err != nil {
		t.Fatal(err)
	}
	_, truths, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	return sc, truths
}

func labelled(truths []Truth, label string, from, to float64) (n int) {
	for _, tr := range truths {
		if tr.StartS >= from && tr.StartS < to && tr.HasLabel(label) {
			n++
		}
	}
	return n
}

// TestScenarioStories checks that each shipped scenario tells the story its
// description promises, with the steady stretches compared with the closed
// form of Marini JJ, Crooke PS, Truwit JD, J Appl Physiol 1989;67:1081 and
// the plateau with PEEP + PEEPi + VT/C [derived from the linear
// single-compartment model, Bates 2009].
func TestScenarioStories(t *testing.T) {
	t.Run("bronchospasm", func(t *testing.T) {
		_, truths := runShipped(t, "bronchospasm")
		// Severe obstruction, settings unchanged: R 45, C 55, VT 500 at
		// 50 L/min, 18 /min, PEEP 5.
		severe := truthAt(t, truths, 600)
		cf := solveClosedForm(45, 0.055, 0.5, 50.0/60, 0, 18, 5)
		within(t, "trapped at 10 min", severe.TrappedML, cf.trappedL*1000, 0.005)
		within(t, "peak at 10 min", severe.PeakCmH2O, cf.ppeak, 0.001)
		if !severe.HasLabel(LabelAirTrapping) {
			t.Errorf("no air trapping at 10 min: %v", severe.Labels)
		}
		// Settings changed, bronchodilator done: R 25, VT 420 at 70 L/min, 12 /min.
		end := truths[len(truths)-1]
		cf = solveClosedForm(25, 0.055, 0.42, 70.0/60, 0, 12, 5)
		within(t, "trapped at the end", end.TrappedML, cf.trappedL*1000, 0.005)
		if labelled(truths, LabelAirTrapping, 14*60, 18*60) > 0 {
			t.Error("air trapping after the settings changes")
		}
		if labelled(truths, LabelAirTrapping, 0, 120) > 0 || labelled(truths, LabelRisingPeak, 0, 120) > 0 {
			t.Error("conditions during the stable lead-in")
		}
		if n := labelled(truths, LabelRisingPeak, 120, 480); n < 100 {
			t.Errorf("%d breaths labelled rising-peak-pressure during the ramp", n)
		}
	})
	t.Run("hyperinflation", func(t *testing.T) {
		_, truths := runShipped(t, "hyperinflation")
		start := truthAt(t, truths, 200)
		cf := solveClosedForm(22, 0.075, 0.65, 40.0/60, 0.3, 22, 5)
		within(t, "trapped before the changes", start.TrappedML, cf.trappedL*1000, 0.005)
		within(t, "plateau before the changes", start.PlateauCmH2O, cf.pplat, 0.001)
		end := truths[len(truths)-1]
		cf = solveClosedForm(22, 0.075, 0.5, 1, 0, 16, 5)
		within(t, "trapped at the end", end.TrappedML, cf.trappedL*1000, 0.005)
		if !start.HasLabel(LabelAirTrapping) || end.HasLabel(LabelAirTrapping) {
			t.Errorf("labels: start %v, end %v", start.Labels, end.Labels)
		}
		// Each step lowers the trapped volume.
		prev := start.TrappedML
		for _, at := range []float64{5.5 * 60, 7.5 * 60, 9.5 * 60, 13 * 60} {
			tr := truthAt(t, truths, at)
			if !(tr.TrappedML < prev) {
				t.Errorf("trapped %g mL at %g s, not below %g", tr.TrappedML, at, prev)
			}
			prev = tr.TrappedML
		}
	})
	t.Run("secretions", func(t *testing.T) {
		_, truths := runShipped(t, "secretions")
		before, after := truthAt(t, truths, 240), truths[len(truths)-1]
		if r := after.PeakCmH2O / before.PeakCmH2O; r < 1.2 || r > 1.3 {
			t.Errorf("peak rose by a factor %.3f, want about 1.25", r)
		}
		near(t, "plateau change", after.PlateauCmH2O-before.PlateauCmH2O, 0, 0.5)
		if labelled(truths, LabelRisingPeak, 5*60, 15*60) < 100 {
			t.Error("rising peak not labelled during the ramp")
		}
	})
	t.Run("stiffening", func(t *testing.T) {
		_, truths := runShipped(t, "stiffening")
		end := truths[len(truths)-1]
		cf := solveClosedForm(10, 0.018, 0.45, 50.0/60, 0.3, 18, 8)
		within(t, "plateau at the end", end.PlateauCmH2O, cf.pplat, 0.001)
		if !end.HasLabel(LabelHighPlateau) || !end.HasLabel(LabelHighDriving) {
			t.Errorf("labels at the end: %v", end.Labels)
		}
		if first := truthAt(t, truths, 60); len(first.Labels) != 0 {
			t.Errorf("labels at 1 min: %v", first.Labels)
		}
	})
	t.Run("disconnect", func(t *testing.T) {
		sc, truths := runShipped(t, "disconnect")
		s, err := New(sc)
		if err != nil {
			t.Fatal(err)
		}
		var events []LinkEvent
		var inGap int
		for {
			smp, ok := s.Next()
			if !ok {
				break
			}
			for _, w := range [][2]float64{{120, 140}, {240, 285}, {390, 420}} {
				if smp.TimeS >= w[0] && smp.TimeS < w[1] {
					inGap++
				}
			}
			events = append(events, s.TakeLinkEvents()...)
		}
		if inGap != 0 {
			t.Errorf("%d samples inside the disconnections", inGap)
		}
		want := []LinkEvent{{120, false}, {140, true}, {240, false}, {285, true}, {390, false}, {420, true}}
		if len(events) != len(want) {
			t.Fatalf("link events %v, want %v", events, want)
		}
		for i, ev := range events {
			if ev.Up != want[i].Up || abs(ev.TimeS-want[i].TimeS) > 1e-9 {
				t.Errorf("event %d = %+v, want %+v", i, ev, want[i])
			}
		}
		for _, tr := range truths {
			lost := tr.StartS < 140 && tr.EndS > 120 || tr.StartS < 285 && tr.EndS > 240 || tr.StartS < 420 && tr.EndS > 390
			if lost != tr.HasLabel(LabelSignalLost) {
				t.Errorf("breath %d at %g–%g s: labels %v", tr.Seq, tr.StartS, tr.EndS, tr.Labels)
			}
		}
	})
	t.Run("stable", func(t *testing.T) {
		_, truths := runShipped(t, "stable")
		for _, tr := range truths {
			if len(tr.Labels) != 0 {
				t.Fatalf("breath %d labelled %v", tr.Seq, tr.Labels)
			}
		}
	})
	t.Run("noisy", func(t *testing.T) {
		_, truths := runShipped(t, "noisy")
		if n := labelled(truths, LabelArtifact, 0, 600); n < 3 || n > 12 {
			t.Errorf("%d breaths with artifacts, want one to four per burst", n)
		}
	})
}
