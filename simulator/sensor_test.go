package simulator

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/stat"

	"trapline/ingest"
)

// sensorPair runs the same patient through a perfect sensor and through
// cfg, and returns both sample sets.
func sensorPair(t *testing.T, cfg Sensor, seed uint64) (clean, seen []ingest.Sample) {
	t.Helper()
	sc := Steady{RCmH2OSPerL: 20, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 15, PEEPCmH2O: 5,
		DurationS: 120, Seed: seed}.Scenario()
	clean, _, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	sc.Sensor = cfg
	seen, _, err = Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	return clean, seen
}

// TestSensorNoise: the added noise has the set standard deviation and zero
// mean. Reference: gonum stat.MeanStdDev; the standard error of a sample
// standard deviation of n normal draws is σ/√(2n) (normal sampling
// theory), so 3 % is over 4 standard errors at n = 12000.
func TestSensorNoise(t *testing.T) {
	clean, seen := sensorPair(t, Sensor{PressureNoiseCmH2O: 0.5, FlowNoiseLPM: 2}, 42)
	dp := make([]float64, len(clean))
	df := make([]float64, len(clean))
	for i := range clean {
		dp[i] = seen[i].PressureCmH2O - clean[i].PressureCmH2O
		df[i] = (seen[i].FlowLPS - clean[i].FlowLPS) * 60
	}
	for _, c := range []struct {
		name  string
		d     []float64
		sigma float64
	}{{"pressure", dp, 0.5}, {"flow", df, 2}} {
		mean, sd := stat.MeanStdDev(c.d, nil)
		within(t, c.name+" noise σ", sd, c.sigma, 0.03)
		near(t, c.name+" noise mean", mean, 0, 4*c.sigma/math.Sqrt(float64(len(c.d))))
	}
}

// TestSensorOffsetDriftQuantization: offset and drift add a straight line
// (fitted with gonum stat.LinearRegression), and quantization rounds to the
// step, never by more than half of it.
func TestSensorOffsetDriftQuantization(t *testing.T) {
	clean, seen := sensorPair(t, Sensor{PressureOffsetCmH2O: 0.7, PressureDriftCmH2OPerH: 36, FlowOffsetLPM: -1.5, FlowDriftLPMPerH: 18}, 1)
	ts := make([]float64, len(clean))
	dp := make([]float64, len(clean))
	df := make([]float64, len(clean))
	for i := range clean {
		ts[i] = clean[i].TimeS
		dp[i] = seen[i].PressureCmH2O - clean[i].PressureCmH2O
		df[i] = (seen[i].FlowLPS - clean[i].FlowLPS) * 60
	}
	a, b := stat.LinearRegression(ts, dp, nil, false)
	near(t, "pressure offset", a, 0.7, 1e-9)
	near(t, "pressure drift per s", b, 36.0/3600, 1e-12)
	a, b = stat.LinearRegression(ts, df, nil, false)
	near(t, "flow offset", a, -1.5, 1e-9)
	near(t, "flow drift per s", b, 18.0/3600, 1e-12)

	clean, seen = sensorPair(t, Sensor{PressureStepCmH2O: 0.25, FlowStepLPM: 0.5}, 1)
	for i := range clean {
		p, f := seen[i].PressureCmH2O, seen[i].FlowLPS*60
		if r := p / 0.25; math.Abs(r-math.Round(r)) > 1e-9 || math.Abs(p-clean[i].PressureCmH2O) > 0.125+1e-9 {
			t.Fatalf("sample %d: pressure %g not the 0.25 step nearest to %g", i, p, clean[i].PressureCmH2O)
		}
		if r := f / 0.5; math.Abs(r-math.Round(r)) > 1e-9 || math.Abs(f-clean[i].FlowLPS*60) > 0.25+1e-9 {
			t.Fatalf("sample %d: flow %g L/min not the 0.5 step nearest to %g", i, f, clean[i].FlowLPS*60)
		}
	}
}

// TestSensorJitterAndDrops: sampling instants scatter with the set σ within
// ±40 % of the period and stay in order; samples are dropped at the set
// rate (binomial: within 4 standard deviations, √(n·p·(1−p))).
func TestSensorJitterAndDrops(t *testing.T) {
	_, seen := sensorPair(t, Sensor{JitterS: 0.001, DropProbability: 0.02}, 7)
	const n, p = 12000, 0.02
	dropped := n - len(seen)
	near(t, "dropped samples", float64(dropped), n*p, 4*math.Sqrt(n*p*(1-p)))
	var dev []float64
	prev := -1.0
	for _, s := range seen {
		k := math.Round(s.TimeS * 100)
		d := s.TimeS - k/100
		if math.Abs(d) > 0.004+1e-12 {
			t.Fatalf("time %g is %g s off its slot", s.TimeS, d)
		}
		if s.TimeS <= prev {
			t.Fatalf("time %g after %g", s.TimeS, prev)
		}
		prev = s.TimeS
		dev = append(dev, d)
	}
	within(t, "jitter σ", stat.StdDev(dev, nil), 0.001, 0.05)
}

// TestArtifactBurst: an artifact burst adds noise of its own σ only inside
// its window.
func TestArtifactBurst(t *testing.T) {
	sc := Steady{RCmH2OSPerL: 20, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 15, PEEPCmH2O: 5, DurationS: 60}.Scenario()
	clean, _, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	sc.Timeline = []Step{{AtS: 20, Event: EventArtifact, DurationS: 10, ArtifactPressureCmH2O: 6, ArtifactFlowLPM: 30}}
	seen, truths, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	var in []float64
	for i := range clean {
		d := seen[i].PressureCmH2O - clean[i].PressureCmH2O
		if clean[i].TimeS >= 20 && clean[i].TimeS < 30 {
			in = append(in, d)
		} else if d != 0 {
			t.Fatalf("sample at %g s disturbed outside the burst", clean[i].TimeS)
		}
	}
	within(t, "artifact σ", stat.StdDev(in, nil), 6, 0.1)
	if n := labelled(truths, LabelArtifact, 0, 60); n != 3 {
		t.Errorf("%d breaths labelled artifact, want the 3 that overlap 20–30 s", n)
	}
}
