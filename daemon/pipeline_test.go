package daemon

import (
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/analyze"
	"trapline/ingest"
	"trapline/simulator"
)

var simEpoch = time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)

// simRun is what a simulated patient produced through the pipeline.
type simRun struct {
	breaths []analyze.Breath
	alerts  []alerts.Event
	truth   []simulator.Truth
	links   []simulator.LinkEvent
}

// runSim drives a live pipeline with a scenario as the daemon would: batches
// of samples stamped with a wall clock that follows the sample clock, ticks
// once a second of wall time (through disconnections too), and the link
// changes as status events.
func runSim(t *testing.T, sc simulator.Scenario, dcfg analyze.DetectorConfig, lcfg alerts.LifecycleConfig) simRun {
	t.Helper()
	sim, err := simulator.New(sc)
	if err != nil {
		t.Fatal(err)
	}
	clock := simEpoch
	p := pipeline.New(pipeline.Options{Stream: sc.Stream, Analysis: analyze.DefaultConfig(), Detectors: dcfg,
		Alarms: lcfg, Now: func() time.Time { return clock }})
	at := func(s float64) time.Time { return simEpoch.Add(time.Duration(s * float64(time.Second))) }
	var r simRun
	collect := func(out stageOutput) {
		r.breaths = append(r.breaths, out.Breaths...)
		r.alerts = append(r.alerts, out.Alerts...)
	}
	batch := make([]ingest.Sample, 10)
	nextTick := 1.0
	for {
		n := sim.Read(batch)
		if n == 0 {
			break
		}
		for ; nextTick <= batch[0].TimeS; nextTick++ {
			clock = at(nextTick)
			collect(p.Tick(clock))
		}
		for _, le := range sim.TakeLinkEvents() {
			r.links = append(r.links, le)
			st := ingest.StatusDisconnected
			if le.Up {
				st = ingest.StatusConnected
			}
			collect(p.Status(ingest.Event{Stream: sc.Stream, Status: st}, clock))
		}
		clock = at(batch[n-1].TimeS)
		collect(p.Samples(batch[:n]))
		r.truth = append(r.truth, sim.TakeTruth()...)
	}
	r.truth = append(r.truth, sim.TakeTruth()...)
	return r
}

// interval is one alarm of a condition, from its raise to its clearing (end
// NaN while still on); superseding raises continue the same alarm.
type interval struct{ startS, endS float64 }

func (r *simRun) intervals(cond string) []interval {
	var out []interval
	on := false
	for _, e := range r.alerts {
		if e.Condition != cond {
			continue
		}
		switch {
		case e.State == alerts.Raised && !on:
			on = true
			out = append(out, interval{e.TS, math.NaN()})
		case e.State == alerts.Cleared && on:
			on = false
			out[len(out)-1].endS = e.TS
		}
	}
	return out
}

func (r *simRun) activeAt(cond string, tS float64) bool {
	for _, iv := range r.intervals(cond) {
		if tS >= iv.startS && (math.IsNaN(iv.endS) || tS < iv.endS) {
			return true
		}
	}
	return false
}

// shipped loads a shipped scenario, with a different seed when seed > 0.
func shipped(t *testing.T, name string, seed uint64) simulator.Scenario {
	t.Helper()
	sc, err := simulator.Shipped(name)
	if err != nil {
		t.Fatal(err)
	}
	if seed > 0 {
		sc.Seed = seed
	}
	return sc
}

// The air-trapping acceptance runs on the simulated patients whose ground
// truth crosses the label threshold of 2 cmH2O of intrinsic PEEP (the
// static value an end-expiratory occlusion reads; Pepe PE, Marini JJ, Am Rev
// Respir Dis 1982) and whose settings are then changed to resolve it.
func TestAirTrappingOnSimulatedPatients(t *testing.T) {
	const evalS = 0.2 // the breath's finding is made just after its end
	for _, name := range []string{"bronchospasm", "hyperinflation"} {
		for _, seed := range []uint64{0, 101, 202} {
			t.Run(fmt.Sprintf("%s/seed%d", name, seed), func(t *testing.T) {
				r := runSim(t, shipped(t, name, seed), analyze.DefaultDetectorConfig(), alerts.DefaultLifecycleConfig())
				cond := analyze.CondAirTrapping
				// Sensitivity on steady-state breaths (intrinsic PEEP within
				// 0.05 cmH2O of the previous breath's) with a true intrinsic
				// PEEP of 2 cmH2O or more.
				hit, n := 0, 0
				cross, last := -1, -1
				for i, tr := range r.truth {
					if tr.PEEPiCmH2O < simulator.AirTrappingCmH2O {
						continue
					}
					if cross < 0 {
						cross = i
					}
					last = i
					if i == 0 || math.Abs(tr.PEEPiCmH2O-r.truth[i-1].PEEPiCmH2O) >= 0.05 {
						continue
					}
					n++
					if r.activeAt(cond, tr.EndS+evalS) {
						hit++
					}
				}
				if n < 20 || cross < 0 {
					t.Fatalf("scenario has %d steady trapping breaths; want a real test", n)
				}
				sens := float64(hit) / float64(n)
				// Onset latency: breaths completed after the one whose true
				// intrinsic PEEP first reached 2 cmH2O, up to the raise
				// (the condition delay of the lifecycle included).
				ivs := r.intervals(cond)
				if len(ivs) == 0 {
					t.Fatalf("never raised")
				}
				latency := 0
				for _, tr := range r.truth[cross+1:] {
					if tr.EndS <= ivs[0].startS+1e-9 {
						latency++
					}
				}
				// Clearing after the settings changes resolved the trapping.
				lastIv := ivs[len(ivs)-1]
				clearBreaths := 0
				for _, tr := range r.truth[last+1:] {
					if tr.EndS <= lastIv.endS+1e-9 {
						clearBreaths++
					}
				}
				t.Logf("sensitivity %.3f (%d/%d steady breaths ≥ 2 cmH2O), onset latency %d breaths, %d alarm(s), cleared %d breaths after the last breath ≥ 2 cmH2O",
					sens, hit, n, latency, len(ivs), clearBreaths)
				if sens < 0.95 {
					t.Errorf("sensitivity %.3f, want ≥ 0.95", sens)
				}
				if latency > 6 {
					t.Errorf("onset latency %d breaths, want ≤ 6", latency)
				}
				if math.IsNaN(lastIv.endS) {
					t.Errorf("alarm not cleared after the trapping resolved (last breath ≥ 2 cmH2O ends at %.1f s)", r.truth[last].EndS)
				}
			})
		}
	}
}

// longStable returns a steady, non-trapping patient at 50 Hz for durS.
func longStable(t *testing.T, name string, seed uint64, durS float64) simulator.Scenario {
	var sc simulator.Scenario
	switch name {
	case "stable":
		sc = shipped(t, "stable", seed)
	case "borderline":
		// τ = 15 × 0.05 = 0.75 s with Te = 2.73 s: Te/τ = 3.6, steady trapped
		// volume 13 mL, intrinsic PEEP 0.26 cmH2O (steady-state closed form of the linear single-compartment model, docs/formulas.md):
		// close to the Te/τ limit but not trapping.
		sc = simulator.Steady{RCmH2OSPerL: 15, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 18, PEEPCmH2O: 5,
			PressureNoiseCmH2O: 0.2, FlowNoiseLPM: 0.5, Seed: seed, Stream: "bed-8"}.Scenario()
	case "case3":
		// check case 3 of docs/formulas.md (negative control): C 0.05, R 5, VT
		// 0.5, RR 20, Ti 1: τ 0.25 s, V_trap 0.17 mL; no air-trapping alert.
		sc = simulator.Steady{RCmH2OSPerL: 5, CMLPerCmH2O: 50, VtML: 500, InspTimeS: 1, RateBPM: 20, PEEPCmH2O: 5,
			PressureNoiseCmH2O: 0.2, FlowNoiseLPM: 0.5, Seed: seed, Stream: "bed-9"}.Scenario()
	}
	sc.SampleRateHz = 50
	sc.DurationS = simulator.Seconds(durS)
	return sc
}

// Twelve simulated hours of steady, non-trapping patients with sensor
// noise raise no alert at all, for several seeds.
func TestNoAlertOnStablePatients(t *testing.T) {
	durS := 12 * 3600.0
	if testing.Short() {
		durS = 2 * 3600
	}
	for _, name := range []string{"stable", "borderline", "case3"} {
		for _, seed := range []uint64{1, 2, 3} {
			t.Run(fmt.Sprintf("%s/seed%d", name, seed), func(t *testing.T) {
				r := runSim(t, longStable(t, name, seed, durS), analyze.DefaultDetectorConfig(), alerts.DefaultLifecycleConfig())
				if len(r.breaths) < int(durS/6) {
					t.Fatalf("%d breaths in %.0f h", len(r.breaths), durS/3600)
				}
				maxPEEPi := 0.0
				for _, tr := range r.truth {
					maxPEEPi = max(maxPEEPi, tr.PEEPiCmH2O)
				}
				if maxPEEPi >= 1 {
					t.Fatalf("not a non-trapping patient: true intrinsic PEEP up to %.2f", maxPEEPi)
				}
				for _, e := range r.alerts {
					t.Errorf("alert at %.1f s: %s %s %s", e.TS, e.Condition, e.State, e.Message)
				}
				t.Logf("%d breaths over %.0f h, true intrinsic PEEP ≤ %.2f cmH2O, %d alerts", len(r.breaths), durS/3600, maxPEEPi, len(r.alerts))
			})
		}
	}
}

// The rising-peak-pressure acceptance: the secretions patient (resistance
// 10 → 17 over 10 min, peak +25 %, plateau stable) and the stiffening
// patient (compliance 50 → 18 over 12 min); under constant-flow volume
// control Ppeak − Pplat = R·V' and Pplat − PEEP = VT/C (the linear single-compartment model, docs/formulas.md), so
// the first rise is resistive and the second elastic.
func TestRisingPeakOnSimulatedPatients(t *testing.T) {
	tests := []struct {
		scenario string
		startS   float64 // start of the ramp in the scenario
		kind     string
	}{
		{"secretions", 300, "resistive"},
		{"stiffening", 180, "elastic"},
	}
	for _, tt := range tests {
		for _, seed := range []uint64{0, 11, 22} {
			t.Run(fmt.Sprintf("%s/seed%d", tt.scenario, seed), func(t *testing.T) {
				r := runSim(t, shipped(t, tt.scenario, seed), analyze.DefaultDetectorConfig(), alerts.DefaultLifecycleConfig())
				var raised *alerts.Event
				for i, e := range r.alerts {
					if e.Condition == analyze.CondRisingPeakPressure && e.State == alerts.Raised {
						raised = &r.alerts[i]
						break
					}
				}
				if raised == nil {
					t.Fatal("rising-peak-pressure never raised")
				}
				delay := raised.TS - tt.startS
				t.Logf("raised %.0f s after the start of the rise: %s", delay, raised.Message)
				if delay < 0 || delay > 180 {
					t.Errorf("raised %.0f s after the start of the rise, want within 0–180 s", delay)
				}
				if !strings.Contains(raised.Message, tt.kind) {
					t.Errorf("message %q does not say %s", raised.Message, tt.kind)
				}
				frac := raised.Evidence["resistive_fraction"]
				if (tt.kind == "resistive") != (frac >= 0.5) {
					t.Errorf("resistive_fraction %.2f for a %s rise", frac, tt.kind)
				}
			})
		}
	}
}

// Signal-lost: each disconnection of the shipped scenario raises within
// the configured time (plus one tick of the daemon's clock) and clears with
// the first samples after the reconnection.
func TestSignalLostOnDisconnection(t *testing.T) {
	dcfg := analyze.DefaultDetectorConfig()
	r := runSim(t, shipped(t, "disconnect", 0), dcfg, alerts.DefaultLifecycleConfig())
	var downs, ups []float64
	for _, le := range r.links {
		if le.Up {
			ups = append(ups, le.TimeS)
		} else {
			downs = append(downs, le.TimeS)
		}
	}
	ivs := r.intervals(analyze.CondSignalLost)
	if len(downs) != 3 || len(ups) != 3 || len(ivs) != 3 {
		t.Fatalf("%d disconnections, %d reconnections, %d signal-lost alarms; want 3 each", len(downs), len(ups), len(ivs))
	}
	for i, iv := range ivs {
		after := iv.startS - downs[i]
		clearAfter := iv.endS - ups[i]
		t.Logf("disconnection %d (%.0f s): raised %.2f s after the last sample, cleared %.2f s after the first new one",
			i+1, ups[i]-downs[i], after, clearAfter)
		if after < dcfg.Signal.LostAfterS-0.02 || after > dcfg.Signal.LostAfterS+1.02 {
			t.Errorf("raised %.2f s after the disconnection, want %g–%g s", after, dcfg.Signal.LostAfterS, dcfg.Signal.LostAfterS+1)
		}
		if math.IsNaN(clearAfter) || clearAfter < 0 || clearAfter > 0.1 {
			t.Errorf("cleared %.2f s after the reconnection, want at once", clearAfter)
		}
	}
	for _, e := range r.alerts {
		if e.Condition != analyze.CondSignalLost {
			t.Errorf("unexpected alert %s %s at %.1f s: %s", e.Condition, e.State, e.TS, e.Message)
		}
	}
}

// BenchmarkPipelineSamples measures the whole per-stream pipeline (analyzer,
// detectors, lifecycle) per sample, on a trapping patient at 100 Hz.
func BenchmarkPipelineSamples(b *testing.B) {
	sc := simulator.Steady{RCmH2OSPerL: 25, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45, RateBPM: 24, PEEPCmH2O: 5,
		PressureNoiseCmH2O: 0.2, FlowNoiseLPM: 0.5, DurationS: 600, Seed: 1}.Scenario()
	ss, _, err := simulator.Run(sc)
	if err != nil {
		b.Fatal(err)
	}
	now := simEpoch
	p := pipeline.New(defaultPipelineOptions("bench", func() time.Time { return now }))
	const batch = 10
	b.ReportAllocs()
	b.SetBytes(0)
	n, off := 0, 0.0
	for b.Loop() {
		if n+batch > len(ss) {
			n, off = 0, off+ss[len(ss)-1].TimeS+0.01
		}
		chunk := make([]ingest.Sample, batch)
		copy(chunk, ss[n:n+batch])
		for i := range chunk {
			chunk[i].TimeS += off
		}
		now = simEpoch.Add(time.Duration(chunk[batch-1].TimeS * float64(time.Second)))
		p.Samples(chunk)
		n += batch
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*batch), "ns/sample")
}

// Sixty random steady patients (R 5–35 cmH2O·s/L, C 20–80 mL/cmH2O, VT
// 350–650 mL, 10–30 /min, flow 40–70 L/min, with sensor noise), ten
// minutes each: an air-trapping alarm is on at the end for every patient
// whose true intrinsic PEEP is 2 cmH2O or more, and never raised for one
// under 1.5 cmH2O; no steady patient raises a rising peak pressure. The
// truth is the simulator's model state, and for these linear patients the
// steady-state closed form of the linear single-compartment model (docs/formulas.md).
func TestAirTrappingOnRandomPatients(t *testing.T) {
	rng := rand.New(rand.NewPCG(9, 9))
	trapping, hits, quiet, falseAlarms := 0, 0, 0, 0
	for k := range 60 {
		st := simulator.Steady{RCmH2OSPerL: 5 + 30*rng.Float64(), CMLPerCmH2O: 20 + 60*rng.Float64(),
			VtML: 350 + 300*rng.Float64(), RateBPM: 10 + 20*rng.Float64(), FlowLPM: 40 + 30*rng.Float64(),
			PEEPCmH2O: 5, PressureNoiseCmH2O: 0.2, FlowNoiseLPM: 0.5, Seed: uint64(k), DurationS: 600,
			SampleRateHz: 50, Stream: "bed-r"}
		r := runSim(t, st.Scenario(), analyze.DefaultDetectorConfig(), alerts.DefaultLifecycleConfig())
		if len(r.truth) < 20 {
			t.Fatalf("patient %d: %d breaths", k, len(r.truth))
		}
		end := r.truth[len(r.truth)-1]
		desc := fmt.Sprintf("R %.0f C %.0f VT %.0f %.0f/min flow %.0f: true intrinsic PEEP %.2f", st.RCmH2OSPerL,
			st.CMLPerCmH2O, st.VtML, st.RateBPM, st.FlowLPM, end.PEEPiCmH2O)
		switch {
		case end.PEEPiCmH2O >= simulator.AirTrappingCmH2O:
			trapping++
			if r.activeAt(analyze.CondAirTrapping, end.EndS-0.5) {
				hits++
			} else {
				t.Errorf("missed: %s", desc)
			}
		case end.PEEPiCmH2O < 1.5:
			quiet++
			if n := len(r.intervals(analyze.CondAirTrapping)); n > 0 {
				falseAlarms++
				t.Errorf("false air-trapping alarm: %s", desc)
			}
		}
		if n := len(r.intervals(analyze.CondRisingPeakPressure)); n > 0 {
			t.Errorf("rising-peak-pressure on a steady patient: %s", desc)
		}
	}
	t.Logf("trapping patients alarmed %d/%d; patients under 1.5 cmH2O with an alarm %d/%d", hits, trapping, falseAlarms, quiet)
	if trapping < 10 || quiet < 10 {
		t.Errorf("%d trapping and %d quiet patients: the draw does not test both sides", trapping, quiet)
	}
}

// TestPipelineSurvivesHostileSamples feeds samples with NaN, infinite,
// huge, repeated and backward values, and status events and ticks at odd
// times: no panic, and every alert event encodes.
func TestPipelineSurvivesHostileSamples(t *testing.T) {
	specials := []float64{math.NaN(), math.Inf(1), math.Inf(-1), 0, -1e308, 1e308, 5e-324, 1, -1}
	rng := rand.New(rand.NewPCG(5, 6))
	for _, offline := range []bool{false, true} {
		var p *pipeline.Pipeline
		if offline {
			p = pipeline.NewOffline(defaultPipelineOptions("bed-x", nil), simEpoch)
		} else {
			p = pipeline.New(defaultPipelineOptions("bed-x", func() time.Time { return simEpoch }))
		}
		sc := simulator.Steady{RCmH2OSPerL: 25, CMLPerCmH2O: 60, VtML: 600, FlowLPM: 45, RateBPM: 24, PEEPCmH2O: 5,
			DurationS: 300, SampleRateHz: 50}.Scenario()
		ss, _, err := simulator.Run(sc)
		if err != nil {
			t.Fatal(err)
		}
		var events int
		for i := 0; i < len(ss); i += 10 {
			batch := append([]ingest.Sample(nil), ss[i:min(i+10, len(ss))]...)
			for j := range batch {
				if rng.IntN(20) == 0 {
					switch rng.IntN(4) {
					case 0:
						batch[j].TimeS = specials[rng.IntN(len(specials))]
					case 1:
						batch[j].PressureCmH2O = specials[rng.IntN(len(specials))]
					case 2:
						batch[j].FlowLPS = specials[rng.IntN(len(specials))]
					default:
						batch[j].TimeS -= 50 * rng.Float64()
					}
				}
			}
			out := p.Samples(batch)
			if rng.IntN(50) == 0 {
				st := []ingest.Status{ingest.StatusGap, ingest.StatusDisconnected, ingest.StatusConnected}[rng.IntN(3)]
				out.Alerts = append(out.Alerts, p.Status(ingest.Event{Status: st, GapS: specials[rng.IntN(len(specials))]}, simEpoch).Alerts...)
			}
			if rng.IntN(10) == 0 {
				out.Alerts = append(out.Alerts, p.Tick(simEpoch.Add(time.Duration(rng.IntN(1e6))*time.Millisecond)).Alerts...)
			}
			for _, e := range out.Alerts {
				events++
				if _, err := e.Marshal(); err != nil {
					t.Fatalf("offline %v: event does not encode: %v", offline, err)
				}
			}
			for _, b := range out.Breaths {
				if _, err := b.MarshalJSON(); err != nil {
					t.Fatal(err)
				}
			}
		}
		t.Logf("offline %v: %d alert events, all encodable", offline, events)
	}
}

// defaultPipelineOptions are the shipped configurations for stream, on the
// wall clock now (nil: time.Now).
func defaultPipelineOptions(stream string, now func() time.Time) pipeline.Options {
	return pipeline.Options{Stream: stream, Analysis: analyze.DefaultConfig(), Detectors: analyze.DefaultDetectorConfig(),
		Alarms: alerts.DefaultLifecycleConfig(), Now: now}
}
