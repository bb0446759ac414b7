package sweep

import (
	"slices"
	"testing"

	"trapline/analyze"
	"trapline/simulator"
)

// TestInferredSettingsThroughRampAndLeak runs patients of the acceptance
// grid whose course doubles the resistance over two minutes from a third
// of the run, changes the rate (+4 /min) and PEEP (+2 cmH2O) at half of
// it and brings the resistance back at two thirds, on a clean sensor and
// with leaks of about 5 and 10 %, under volume control (square flow, and
// decelerating flow with a pause). The only change of settings is the
// scripted one (the grid's own course, the ground truth here): it is
// reported once, as rate-up and peep-up, within 20 s, and no change of
// set volume or flow is reported anywhere. Before the offset and leak
// correction was put back for the settings, the correction moving in the
// resistance ramp read as vt-down and flow-down on 33 of these 36
// patients, and a leak growing with the airway pressure did too.
func TestInferredSettingsThroughRampAndLeak(t *testing.T) {
	if testing.Short() {
		t.Skip("24 patients of 10 simulated minutes")
	}
	g, err := LoadGrid("../../docs/sweep-acceptance.yaml")
	if err != nil {
		t.Fatal(err)
	}
	p, err := g.Expand()
	if err != nil {
		t.Fatal(err)
	}
	ran := 0
	for i := range p.Cases {
		c := &p.Cases[i]
		if c.SampleRateHz != 50 || c.RCmH2OSPerL < 40 || !slices.Contains([]string{"clean", "offset+1"}, c.Noise) ||
			!slices.Contains([]string{"vc-sq-rr20", "vc-dec-pause-rr16"}, c.Setting) || c.Model == "two-compartment-3x" {
			continue
		}
		ran++
		ss, _, err := simulator.Run(c.SimScenario())
		if err != nil {
			t.Fatal(err)
		}
		a := analyze.NewAnalyzer("s", analyze.DefaultConfig())
		var real, other []string
		for _, s := range ss {
			b := a.Next(s)
			if b == nil || len(b.SettingsChanged) == 0 {
				continue
			}
			for _, ch := range b.SettingsChanged {
				if b.StartS >= c.DurationS/2-5 && b.StartS <= c.DurationS/2+20 && (ch == "rate-up" || ch == "peep-up") {
					real = append(real, ch)
				} else {
					other = append(other, ch)
				}
			}
		}
		slices.Sort(real)
		if !slices.Equal(real, []string{"peep-up", "rate-up"}) || slices.ContainsFunc(other, func(ch string) bool {
			return ch == "vt-up" || ch == "vt-down" || ch == "flow-up" || ch == "flow-down"
		}) {
			t.Errorf("%s: the scripted change read as %v, other changes %v; want [peep-up rate-up] and no volume or flow change",
				c.Name, real, other)
		}
	}
	if ran != 24 {
		t.Fatalf("%d patients of the grid ran, want 24 (the grid changed?)", ran)
	}
}
