package simulator

import (
	"math"
	"testing"
)

// benchHour pulls one simulated hour of one patient at 100 Hz.
func benchHour(b *testing.B, sc Scenario) {
	sc.DurationS = 3600
	sc.SampleRateHz = 100
	b.ReportAllocs()
	for b.Loop() {
		s, err := New(sc)
		if err != nil {
			b.Fatal(err)
		}
		n := 0
		for {
			if _, ok := s.Next(); !ok {
				break
			}
			n++
			if n%4096 == 0 {
				s.TakeTruth()
			}
		}
		if n != 360000 {
			b.Fatalf("%d samples", n)
		}
	}
}

// BenchmarkHour100Hz is the speed target: one simulated hour of one
// patient at 100 Hz in under 2 s on one core.
func BenchmarkHour100Hz(b *testing.B) {
	b.Run("linear exact", func(b *testing.B) {
		sc, err := Shipped("bronchospasm")
		if err != nil {
			b.Fatal(err)
		}
		benchHour(b, sc)
	})
	b.Run("rohrer rk4", func(b *testing.B) {
		sc := steadyScenario(10, 60, 600, 45, 24, 5, 3600)
		sc.Patient.K2CmH2OS2PerL2 = 5
		benchHour(b, sc)
	})
	b.Run("two-compartment effort rk4", func(b *testing.B) {
		sc := steadyScenario(0, 0, 600, 45, 16, 5, 3600)
		sc.Patient = Patient{Model: ModelTwoCompartment, ResistanceCmH2OSPerL: 5, ComplianceMLPerCmH2O: 30,
			Resistance2CmH2OSPerL: 40, Compliance2MLPerCmH2O: 40, AirwayResistanceCmH2OSPerL: 5, EffortCmH2O: 4}
		sc.Patient.ExpResistanceCmH2OSPerL, sc.Patient.ExpK2CmH2OS2PerL2 = nan(), nan()
		sc.Ventilator.TriggerLPM = 2
		benchHour(b, sc)
	})
}

// BenchmarkStreamText is an hour at 100 Hz encoded as text at full speed.
func BenchmarkStreamText(b *testing.B) {
	sc, err := Shipped("noisy")
	if err != nil {
		b.Fatal(err)
	}
	sc.DurationS = 3600
	enc := textEncoder(b)
	b.ReportAllocs()
	for b.Loop() {
		s, err := New(sc)
		if err != nil {
			b.Fatal(err)
		}
		if _, err := Stream(b.Context(), s, &writerOutput{w: discard{}}, StreamOptions{Encoder: enc}); err != nil {
			b.Fatal(err)
		}
	}
}

type discard struct{}

func (discard) Write(p []byte) (int, error) { return len(p), nil }

func nan() float64 { return math.NaN() }
