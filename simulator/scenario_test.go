package simulator

import (
	"bytes"
	"encoding/json"
	"math"
	"strings"
	"testing"

	"trapline/ingest"
)

// TestShippedScenariosRun runs every shipped scenario to its end and checks
// that it writes ground truth for its breaths.
func TestShippedScenariosRun(t *testing.T) {
	names := ShippedNames()
	if len(names) == 0 {
		t.Fatal("no shipped scenario")
	}
	for _, name := range names {
		t.Run(name, func(t *testing.T) {
			sc, err := Shipped(name)
			if err != nil {
				t.Fatal(err)
			}
			samples, truths, err := Run(sc)
			if err != nil {
				t.Fatal(err)
			}
			// The same at full speed through Stream: every breath's truth
			// is written as one JSON line.
			sim, err := New(sc)
			if err != nil {
				t.Fatal(err)
			}
			var truthOut bytes.Buffer
			st, err := Stream(t.Context(), sim, &writerOutput{w: discard{}}, StreamOptions{Encoder: textEncoder(t), Speed: math.Inf(1), Truth: &truthOut})
			if err != nil {
				t.Fatal(err)
			}
			lines := strings.Split(strings.TrimSpace(truthOut.String()), "\n")
			if st.Samples != uint64(len(samples)) || len(lines) != len(truths) {
				t.Fatalf("Stream wrote %d samples and %d truth lines, Run gave %d and %d", st.Samples, len(lines), len(samples), len(truths))
			}
			var tr Truth
			if err := json.Unmarshal([]byte(lines[len(lines)-1]), &tr); err != nil || tr.Seq != len(truths) {
				t.Fatalf("last truth line %q: %v", lines[len(lines)-1], err)
			}
			// A breath lasts at most 60/rate; the scenario must complete
			// nearly all of the breaths its duration holds.
			minBreaths := int(float64(sc.DurationS)*sc.Ventilator.RateBPM/60) / 2
			if len(truths) < minBreaths {
				t.Errorf("%d breaths, want at least %d", len(truths), minBreaths)
			}
			if len(samples) == 0 {
				t.Error("no samples")
			}
			for i, tr := range truths {
				if tr.Seq != i+1 || !(tr.EndS > tr.StartS) || tr.Labels == nil {
					t.Fatalf("breath %d: bad truth %+v", i, tr)
				}
			}
		})
	}
}

// TestScenarioErrors checks that bad scenarios are rejected with every
// problem named by its key, and never panic.
func TestScenarioErrors(t *testing.T) {
	base := func() Scenario {
		return Steady{RCmH2OSPerL: 10, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 60, RateBPM: 15, PEEPCmH2O: 5}.Scenario()
	}
	cases := []struct {
		name string
		edit func(*Scenario)
		want []string
	}{
		{"zero resistance and compliance", func(s *Scenario) { s.Patient.ResistanceCmH2OSPerL = 0; s.Patient.ComplianceMLPerCmH2O = -1 },
			[]string{"patient.resistance_cmh2o_s_per_l", "patient.compliance_ml_per_cmh2o"}},
		{"no expiration", func(s *Scenario) { s.Ventilator.RateBPM = 60; s.Ventilator.FlowLPM = 30 }, []string{"less than"}},
		{"sample rate", func(s *Scenario) { s.SampleRateHz = 10 }, []string{"sample_rate_hz"}},
		{"unknown mode", func(s *Scenario) { s.Ventilator.Mode = "auto" }, []string{"ventilator.mode"}},
		{"unknown timeline key", func(s *Scenario) {
			s.Timeline = []Step{{AtS: 10, Patient: map[string]float64{"resistence": 3}}}
		}, []string{"timeline[0].patient.resistence"}},
		{"timeline reaches bad values", func(s *Scenario) {
			s.Ventilator.FlowLPM = 30
			s.Timeline = []Step{{AtS: 10, RampS: 20, Ventilator: map[string]float64{"rate_bpm": 80}}}
		}, []string{"timeline[0]"}},
		{"unknown event", func(s *Scenario) { s.Timeline = []Step{{AtS: 1, Event: "explode"}} }, []string{"unknown event"}},
		{"hold without a duration", func(s *Scenario) { s.Timeline = []Step{{AtS: 1, Event: EventExpiratoryHold}} }, []string{"timeline[0]", "expiratory hold"}},
		{"hold too long", func(s *Scenario) {
			s.Timeline = []Step{{AtS: 1, Event: EventExpiratoryHold, DurationS: 21}}
		}, []string{"timeline[0]", "expiratory hold"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			sc := base()
			c.edit(&sc)
			_, err := New(sc)
			if err == nil {
				t.Fatal("accepted")
			}
			for _, w := range c.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q does not name %q", err, w)
				}
			}
		})
	}
}

// TestParseScenario checks the YAML format: durations as strings or
// numbers, timeline sections, and strict keys.
func TestParseScenario(t *testing.T) {
	sc, err := ParseScenario([]byte(`
name: t
duration: 2m
patient: {resistance_cmh2o_s_per_l: 10, compliance_ml_per_cmh2o: 50}
ventilator: {tidal_volume_ml: 500, flow_lpm: 60, rate_bpm: 15, peep_cmh2o: 5}
timeline:
  - at: 30s
    ramp: 1m
    patient: {resistance_cmh2o_s_per_l: 20}
  - at: 100
    event: disconnect
    duration: 5s
`))
	if err != nil {
		t.Fatal(err)
	}
	if sc.DurationS != 120 || sc.Timeline[0].AtS != 30 || sc.Timeline[0].RampS != 60 || sc.Timeline[1].AtS != 100 {
		t.Errorf("durations: %v %v %v %v", sc.DurationS, sc.Timeline[0].AtS, sc.Timeline[0].RampS, sc.Timeline[1].AtS)
	}
	if _, err := ParseScenario([]byte("name: t\npatient: {resistanse: 3}\n")); err == nil {
		t.Error("unknown key accepted")
	}
	if _, err := ParseScenario([]byte("duration: soon\n")); err == nil {
		t.Error("bad duration accepted")
	}
}

// TestReadMatchesNext: reading in batches gives the same samples as
// pulling them one by one.
func TestReadMatchesNext(t *testing.T) {
	sc := shortNoisy(t)
	want, _, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	s, err := New(sc)
	if err != nil {
		t.Fatal(err)
	}
	var got []ingest.Sample
	buf := make([]ingest.Sample, 333)
	for {
		n := s.Read(buf)
		if n == 0 {
			break
		}
		got = append(got, buf[:n]...)
	}
	compareSamples(t, got, want, 0)
	if !s.Done() || s.Emitted() != int64(len(want)) {
		t.Errorf("done %v, emitted %d of %d", s.Done(), s.Emitted(), len(want))
	}
}
