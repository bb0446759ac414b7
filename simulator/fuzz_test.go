package simulator

import (
	"os"
	"path/filepath"
	"testing"
)

// FuzzScenario feeds arbitrary YAML to the scenario decoder and runs what
// it accepts for a few simulated seconds: no input may panic or hang.
// Seeded from the shipped scenarios and testdata/.
func FuzzScenario(f *testing.F) {
	for _, dir := range []string{"scenarios", "testdata"} {
		files, err := filepath.Glob(filepath.Join(dir, "*.yaml"))
		if err != nil {
			f.Fatal(err)
		}
		for _, p := range files {
			data, err := os.ReadFile(p)
			if err != nil {
				f.Fatal(err)
			}
			f.Add(data)
		}
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		if len(data) > 64<<10 {
			return
		}
		sc, err := ParseScenario(data)
		if err != nil {
			return
		}
		// Keep each run short: the fuzzer explores the settings, not time.
		sc.DurationS = min(sc.DurationS, 3)
		sc.SampleRateHz = min(sc.SampleRateHz, 200)
		s, err := New(sc)
		if err != nil {
			return
		}
		for range 1000 {
			if _, ok := s.Next(); !ok {
				break
			}
		}
		for _, tr := range s.TakeTruth() {
			if tr.Labels == nil || !(tr.EndS > tr.StartS) {
				t.Fatalf("bad truth %+v", tr)
			}
		}
	})
}

// TestTestdataScenarios runs the example scenarios of testdata/, which use
// the models the shipped ones do not, and checks that the flow-dependent
// and two-compartment ground truth is filled in.
func TestTestdataScenarios(t *testing.T) {
	for _, name := range []string{"copd-two-compartment", "pc-rohrer"} {
		t.Run(name, func(t *testing.T) {
			sc, err := LoadScenario(filepath.Join("testdata", name+".yaml"))
			if err != nil {
				t.Fatal(err)
			}
			_, truths, err := Run(sc)
			if err != nil {
				t.Fatal(err)
			}
			if len(truths) < 30 {
				t.Fatalf("%d breaths", len(truths))
			}
			last := truths[len(truths)-1]
			switch name {
			case "copd-two-compartment":
				var triggered, active int
				for _, tr := range truths {
					if tr.Triggered {
						triggered++
					}
					if !tr.Passive {
						active++
					}
				}
				if triggered == 0 || active < len(truths)/2 {
					t.Errorf("%d triggered and %d active of %d breaths", triggered, active, len(truths))
				}
				if !(last.TauFastS > 0 && last.TauSlowS > last.TauFastS) {
					t.Errorf("time constants %g, %g", last.TauFastS, last.TauSlowS)
				}
			case "pc-rohrer":
				// Pressure control: the peak is the set pressure above PEEP
				// (6 + 20 after the change).
				near(t, "pip_cmh2o", last.PeakCmH2O, 26, 1e-6)
				if !(last.VtML > 300 && last.VtML < 900) {
					t.Errorf("tidal volume %g mL", last.VtML)
				}
			}
		})
	}
}
