package sweep

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/simulator"
)

// tinyGrid is a grid that runs in a few seconds: two models, one setting
// that traps air at high resistance, one noise level, 4-minute patients
// with the default course, and the disconnection scenario cut to 5
// minutes (its first disconnection is at 2 minutes).
func tinyGrid() Grid {
	g := DefaultGrid()
	g.DurationS = 240
	g.Models = []string{ModelLinear, ModelRohrer}
	g.ResistanceCmH2OSPerL = []float64{10, 35}
	g.ComplianceMLPerCmH2O = []float64{50}
	g.Settings = []Setting{defaultSettings()[2]}
	g.Noise = defaultNoise()[:1]
	g.Scenarios = []string{"disconnect"}
	g.ScenarioDurationS = 300
	return g
}

func runTiny(t *testing.T, sets ...DetectorSet) (*Result, *Summary) {
	t.Helper()
	res := runGrid(t, tinyGrid(), sets...)
	return res, Summarize(res)
}

// runGrid expands g and runs it with the detector sets (the default set
// when none are given).
func runGrid(t *testing.T, g Grid, sets ...DetectorSet) *Result {
	t.Helper()
	plan, err := g.Expand()
	if err != nil {
		t.Fatal(err)
	}
	res, err := Run(t.Context(), plan, Options{Sets: sets})
	if err != nil {
		t.Fatal(err)
	}
	return res
}

// independentCounts recomputes the headline figures of one condition from
// the per-breath truth labels and the alert events, with deliberately
// plain code: for every breath it scans every event again.
type independentCounts struct {
	tp, fn, fp, tn              int
	posEp, detEp, negEp, cleanE int
	alerts, falseAlerts         int
}

func countIndependently(cr *CaseResult, set int, ci int, ep Episodes, out *independentCounts) {
	cond := Scored()[ci]
	// activeAt: the state left by the latest event of the condition at or
	// before time tS (events of one condition never share a time stamp
	// with different states in these runs).
	activeAt := func(tS float64) bool {
		on, last := false, math.Inf(-1)
		for _, e := range cr.Alerts[set] {
			if e.Condition == cond && e.TS <= tS && e.TS >= last {
				last = e.TS
				on = e.State != string(alerts.Cleared)
			}
		}
		return on
	}
	tr := cr.Truth
	for i := range tr {
		pos, on := tr[i].Has(ci), activeAt(tr[i].EndS+ep.MatchTolS)
		switch {
		case pos && on:
			out.tp++
		case pos:
			out.fn++
		case on:
			out.fp++
		default:
			out.tn++
		}
	}
	// Episodes: split the breaths into runs of equal label.
	start := 0
	for i := 1; i <= len(tr); i++ {
		if i < len(tr) && tr[i].Has(ci) == tr[start].Has(ci) {
			continue
		}
		if i-start >= ep.MinBreaths {
			if tr[start].Has(ci) {
				out.posEp++
				for k := start; k < min(i+ep.GraceBreaths, len(tr)); k++ {
					if activeAt(tr[k].EndS + ep.MatchTolS) {
						out.detEp++
						break
					}
				}
			} else {
				out.negEp++
				lo := math.Inf(-1)
				if start > 0 {
					lo = tr[start-1].EndS + ep.MatchTolS
				}
				hi := tr[i-1].EndS + ep.MatchTolS
				if i == len(tr) {
					hi = math.Inf(1) // raises after the last breath belong to it
				}
				clean := true
				for _, e := range cr.Alerts[set] {
					if e.Condition == cond && e.Fresh && e.TS > lo && e.TS <= hi {
						clean = false
					}
				}
				if clean {
					out.cleanE++
				}
			}
		}
		start = i
	}
	// False alerts: a fresh raise is true when a breath with the condition
	// ends while its alarm is on: from the breath the raise belongs to
	// until the clearing event that follows it.
	for k, e := range cr.Alerts[set] {
		if e.Condition != cond || !e.Fresh {
			continue
		}
		out.alerts++
		clearS := math.Inf(1)
		for _, e2 := range cr.Alerts[set][k+1:] {
			if e2.Condition == cond && e2.State == string(alerts.Cleared) {
				clearS = e2.TS
				break
			}
		}
		first, hit := true, false
		for i := range tr {
			end := tr[i].EndS + ep.MatchTolS
			if end < e.TS && i < len(tr)-1 {
				continue
			}
			if !first && end >= clearS {
				break
			}
			first = false
			// Grey zone of air trapping: a true intrinsic PEEP of 1 cmH2O or
			// more makes a raise not false (docs/sweep.md).
			if tr[i].Has(ci) || cond == analyze.CondAirTrapping && tr[i].PEEPiCmH2O >= 1 {
				hit = true
				break
			}
		}
		if !hit {
			out.falseAlerts++
		}
	}
}

// TestHeadlineMatchesIndependentCount checks the summary's headline
// figures against an independent count from the raw truth labels and
// alert events. Sensitivity = TP/(TP+FN) and specificity = TN/(TN+FP)
// follow Altman DG, Bland JM, "Diagnostic tests 1: sensitivity and
// specificity", BMJ 1994;308:1552.
func TestHeadlineMatchesIndependentCount(t *testing.T) {
	res, sum := runTiny(t)
	ep := res.Plan.Grid.Episodes
	hours := 0.0
	for i := range res.Cases {
		hours += res.Cases[i].Case.DurationS / 3600
	}
	var sawTP, sawFalse, sawLost bool
	for ci, cond := range Scored() {
		t.Run(cond, func(t *testing.T) {
			var c independentCounts
			for i := range res.Cases {
				countIndependently(&res.Cases[i], 0, ci, ep, &c)
			}
			got := sum.Sets[0].Conditions[ci]
			if got.Condition != cond {
				t.Fatalf("condition %q, want %q", got.Condition, cond)
			}
			b := got.Breath
			if b.TP != c.tp || b.FN != c.fn || b.FP != c.fp || b.TN != c.tn {
				t.Errorf("breaths tp/fn/fp/tn = %d/%d/%d/%d, independent count %d/%d/%d/%d", b.TP, b.FN, b.FP, b.TN, c.tp, c.fn, c.fp, c.tn)
			}
			e := got.Episode
			if e.Positive != c.posEp || e.Detected != c.detEp || e.Negative != c.negEp || e.Clean != c.cleanE {
				t.Errorf("episodes pos/det/neg/clean = %d/%d/%d/%d, independent count %d/%d/%d/%d",
					e.Positive, e.Detected, e.Negative, e.Clean, c.posEp, c.detEp, c.negEp, c.cleanE)
			}
			if got.Alerts != c.alerts || got.FalseAlerts != c.falseAlerts {
				t.Errorf("alerts %d, false %d; independent count %d, %d", got.Alerts, got.FalseAlerts, c.alerts, c.falseAlerts)
			}
			same := func(name string, got Num, num, den float64) {
				want := math.NaN()
				if den > 0 {
					want = num / den
				}
				if !(float64(got) == want || math.IsNaN(float64(got)) && math.IsNaN(want)) {
					t.Errorf("%s = %v, independent %v", name, got, want)
				}
			}
			same("breath sensitivity", b.Sensitivity, float64(c.tp), float64(c.tp+c.fn))
			same("breath specificity", b.Specificity, float64(c.tn), float64(c.tn+c.fp))
			same("episode sensitivity", e.Sensitivity, float64(c.detEp), float64(c.posEp))
			same("episode specificity", e.Specificity, float64(c.cleanE), float64(c.negEp))
			same("false alerts per hour", got.FalseAlertsPerHour, float64(c.falseAlerts), hours)
			sawTP = sawTP || c.tp > 0
			sawFalse = sawFalse || c.fp > 0 || c.fn > 0
			sawLost = sawLost || (cond == analyze.CondSignalLost && c.tp > 0)
		})
	}
	// The comparison means something only if the run had hits and misses,
	// and the scenario really lost its signal.
	if !sawTP || !sawFalse || !sawLost {
		t.Errorf("run too easy to check: true positives %v, errors %v, signal lost %v", sawTP, sawFalse, sawLost)
	}
}

// TestEstimatorsOnLinearPatient checks the estimator errors on the linear
// model: the least-squares fit of the equation of motion recovers R and C
// of a linear single compartment (Bates, Lung Mechanics, 2009), so the
// median relative errors must be small (our bound: 5 %).
func TestEstimatorsOnLinearPatient(t *testing.T) {
	_, sum := runTiny(t)
	n := 0
	for _, e := range sum.Estimators {
		if e.Model != ModelLinear || (e.Quantity != "r_cmh2o_s_per_l" && e.Quantity != "c_ml_per_cmh2o") {
			continue
		}
		n++
		if e.N < 100 || math.Abs(float64(e.MedianRelPct)) > 5 {
			t.Errorf("%s: n %d, median relative error %v %%", e.Quantity, e.N, e.MedianRelPct)
		}
	}
	if n != 2 {
		t.Fatalf("found %d linear R/C estimator rows, want 2", n)
	}
}

// TestModelMapping checks that the grid's non-linear patients have the
// nominal mechanics: two parallel units behind a shared airway add as
// R0 + 1/(1/R1 + 1/R2) and C1 + C2 (Otis AB et al., J Appl Physiol 1956),
// and the Rohrer resistance K1 + K2·|V'| equals R at the reference flow
// (Rohrer 1915).
func TestModelMapping(t *testing.T) {
	const r, c = 20.0, 60.0
	p := patient(ModelTwoCompartment, r, c, 1, 1)
	if got := p.AirwayResistanceCmH2OSPerL + 1/(1/p.ResistanceCmH2OSPerL+1/p.Resistance2CmH2OSPerL); math.Abs(got-r) > 1e-9 {
		t.Errorf("two-compartment R = %g, want %g", got, r)
	}
	if got := p.ComplianceMLPerCmH2O + p.Compliance2MLPerCmH2O; got != c {
		t.Errorf("two-compartment C = %g, want %g", got, c)
	}
	p = patient(ModelRohrer, r, c, 1, 1)
	if got := p.ResistanceCmH2OSPerL + p.K2CmH2OS2PerL2*RohrerRefFlowLPS; math.Abs(got-r) > 1e-9 {
		t.Errorf("Rohrer R at the reference flow = %g, want %g", got, r)
	}
	// The simulator's own truth agrees for the two-compartment patient.
	g := tinyGrid()
	sc := g.scenario(ModelTwoCompartment, r, c, g.Settings[0], g.Noise[0], 1)
	sc.Timeline, sc.DurationS = nil, 30
	_, truth, err := simulator.Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	if len(truth) == 0 || math.Abs(truth[len(truth)-1].RCmH2OSPerL-r) > 1e-9 || math.Abs(truth[len(truth)-1].CMLPerCmH2O-c) > 1e-9 {
		t.Errorf("simulator truth R, C = %+v, want %g, %g", truth[len(truth)-1], r, c)
	}
}

// TestQuantile checks the type 7 sample quantile of Hyndman RJ, Fan Y,
// "Sample quantiles in statistical packages", Am Stat 1996;50:361 (the
// default of R and NumPy): Q(p) = x[h] with h = (n−1)p, interpolated.
func TestQuantile(t *testing.T) {
	for _, tc := range []struct {
		xs   []float64
		q    float64
		want float64
	}{
		{[]float64{4, 1, 3, 2}, 0.5, 2.5},
		{[]float64{1, 2, 3, 4, 5, 6, 7, 8, 9, 10}, 0.9, 9.1},
		{[]float64{1, 2, 3, 4, 5, 6, 7, 8, 9, 10}, 0.1, 1.9},
		{[]float64{7}, 0.3, 7},
	} {
		if got := float64(quantile(tc.xs, tc.q)); math.Abs(got-tc.want) > 1e-12 {
			t.Errorf("quantile(%v, %g) = %g, want %g", tc.xs, tc.q, got, tc.want)
		}
	}
	if got := quantile(nil, 0.5); !math.IsNaN(float64(got)) {
		t.Errorf("quantile of nothing = %g, want NaN", got)
	}
}

func TestParseGrid(t *testing.T) {
	for _, tc := range []struct {
		name, yaml string
		check      func(t *testing.T, g Grid, err error)
	}{
		{"empty file is the default grid", "", func(t *testing.T, g Grid, err error) {
			if err != nil || len(g.Models) != len(DefaultGrid().Models) || len(g.SampleRatesHz) != 1 || g.SampleRatesHz[0] != 50 {
				t.Errorf("got %v, %+v", err, g)
			}
		}},
		{"lists are replaced", "models: [rohrer]\nresistance_cmh2o_s_per_l: [12]\nsettings:\n  - name: pc\n    mode: pc\n    insp_pressure_cmh2o: 15\n    insp_time_s: 1\n    rate_bpm: 20\n    peep_cmh2o: 8\n", func(t *testing.T, g Grid, err error) {
			if err != nil || len(g.Models) != 1 || g.ResistanceCmH2OSPerL[0] != 12 || g.Settings[0].Mode != "pc" || g.Settings[0].PEEPCmH2O != 8 {
				t.Errorf("got %v, %+v", err, g)
			}
			if len(g.ComplianceMLPerCmH2O) != 3 {
				t.Errorf("compliances not kept from the default: %v", g.ComplianceMLPerCmH2O)
			}
		}},
		{"unknown key", "modles: [linear]\n", func(t *testing.T, _ Grid, err error) {
			if err == nil || !strings.Contains(err.Error(), "modles") {
				t.Errorf("error %v, want one naming modles", err)
			}
		}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			g, err := ParseGrid([]byte(tc.yaml))
			tc.check(t, g, err)
		})
	}
}

// TestExpandReportsEveryProblem checks that grid validation lists all
// problems at once.
func TestExpandReportsEveryProblem(t *testing.T) {
	g := DefaultGrid()
	g.SampleRatesHz = []float64{50, 5}
	g.Models = []string{"linear", "balloon"}
	g.Seeds = 0
	g.Scenarios = []string{"no-such-scenario"}
	_, err := g.Expand()
	if err == nil {
		t.Fatal("no error")
	}
	for _, want := range []string{"sample_rates_hz[1]", "balloon", "seeds"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error %q does not mention %s", err, want)
		}
	}
	// A grid whose settings leave no time to breathe out fails per case.
	g = tinyGrid()
	g.Settings[0].RateBPM = 90
	if _, err := g.Expand(); err == nil || !strings.Contains(err.Error(), "linear/R10") {
		t.Errorf("error %v, want one naming the case", err)
	}
}

func TestDefaultGridSize(t *testing.T) {
	plan, err := DefaultGrid().Expand()
	if err != nil {
		t.Fatal(err)
	}
	if h := plan.TotalS() / 3600; h < 500 {
		t.Errorf("default grid covers %.1f patient-hours, want at least 500", h)
	}
	plan, err = QuickGrid().Expand()
	if err != nil {
		t.Fatal(err)
	}
	if h := plan.TotalS() / 3600; h > 25 {
		t.Errorf("quick grid covers %.1f patient-hours, want a small grid", h)
	}
}

// TestRunCancel checks that a cancelled run returns promptly with the
// context's error and leaves no goroutine behind.
func TestRunCancel(t *testing.T) {
	base := runtime.NumGoroutine()
	plan, err := DefaultGrid().Expand()
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(t.Context())
	time.AfterFunc(200*time.Millisecond, cancel)
	start := time.Now()
	_, err = Run(ctx, plan, Options{Workers: 2})
	if !errors.Is(err, context.Canceled) {
		t.Fatalf("error %v, want context.Canceled", err)
	}
	if d := time.Since(start); d > 10*time.Second {
		t.Errorf("returned %v after cancellation", d)
	}
	deadline := time.Now().Add(5 * time.Second)
	for runtime.NumGoroutine() > base && time.Now().Before(deadline) {
		time.Sleep(10 * time.Millisecond)
	}
	if n := runtime.NumGoroutine(); n > base {
		t.Errorf("%d goroutines after the run, %d before", n, base)
	}
}

// TestCompareSeesSamePatients runs two sets, the second with a faster
// air-trapping rule: both see the same breaths, and the faster rule raises
// no later.
func TestCompareSeesSamePatients(t *testing.T) {
	fast := DefaultDetectorSet()
	fast.Name = "fast"
	fast.Detectors.AirTrapping.N, fast.Detectors.AirTrapping.M = 2, 3
	res, sum := runTiny(t, DefaultDetectorSet(), fast)
	if len(sum.Sets) != 2 || len(res.Cases[0].Alerts) != 2 {
		t.Fatalf("want two sets, got %d", len(sum.Sets))
	}
	ci := indexOf(Scored(), analyze.CondAirTrapping)
	a, b := sum.Sets[0].Conditions[ci], sum.Sets[1].Conditions[ci]
	if a.Breath.TP+a.Breath.FN != b.Breath.TP+b.Breath.FN || a.Breath.TN+a.Breath.FP != b.Breath.TN+b.Breath.FP {
		t.Errorf("the sets saw different breaths: %+v vs %+v", a.Breath, b.Breath)
	}
	if a.Onset.N == 0 || !(b.Onset.MedianS < a.Onset.MedianS) {
		t.Errorf("onset median: default %v s (n %d), 2-of-3 %v s; want the 2-of-3 rule faster", a.Onset.MedianS, a.Onset.N, b.Onset.MedianS)
	}
}

// TestReport writes the report and checks that it is self-contained and
// carries every plot.
func TestReport(t *testing.T) {
	res, sum := runTiny(t)
	ex, err := PickExample(t.Context(), res, nil)
	if err != nil || ex == nil {
		t.Fatalf("example: %v, %v", ex, err)
	}
	path := filepath.Join(t.TempDir(), "report.html")
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	if err := WriteReport(f, res, sum, ex); err != nil {
		t.Fatal(err)
	}
	if err := f.Close(); err != nil {
		t.Fatal(err)
	}
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	html := string(data)
	// Curve, limits, error plots and the waveform, plus at least one
	// latency pair.
	if n := strings.Count(html, "<svg"); n < 5 {
		t.Errorf("%d inline SVG plots, want at least 5", n)
	}
	for _, bad := range []string{"<script", "<link", "src=\"http", "href=\"http"} {
		if strings.Contains(html, bad) {
			t.Errorf("report refers to an external resource: %s", bad)
		}
	}
	if !strings.Contains(html, "air-trapping: alarm vs true intrinsic PEEP") || !strings.Contains(html, ex.Case) {
		t.Error("report lacks the sensitivity curve or the example")
	}
	js, err := sum.JSON()
	if err != nil || !strings.Contains(string(js), `"type": "sweep-summary"`) {
		t.Errorf("summary JSON: %v", err)
	}
	screenshotReport(t, path)
}

// TestStepSize checks that the grid's 4 ms Runge–Kutta step gives the same
// truth as the simulator's 0.5 ms default within 1 % (or 2 mL and 0.05
// cmH2O) for every non-linear model at the fastest and at the slowest
// time constants of the default grid (the slow ones trap air). Classical fourth-order Runge–Kutta converges as h⁴
// (Butcher JC, Numerical Methods for Ordinary Differential Equations,
// 2008), so the fine step stands in for the exact solution.
func TestStepSize(t *testing.T) {
	g := DefaultGrid()
	for _, tc := range []struct {
		model string
		r, c  float64
	}{
		{ModelRohrer, 8, 30}, {ModelTwoCompartment, 8, 30}, {ModelFlowLimited, 8, 30}, {ModelEffort, 8, 30},
		{ModelRohrer, 35, 80}, {ModelTwoCompartment, 35, 80}, {ModelFlowLimited, 35, 80}, {ModelEffort, 35, 80},
	} {
		t.Run(fmt.Sprintf("%s/R%g/C%g", tc.model, tc.r, tc.c), func(t *testing.T) {
			last := func(step float64) simulator.Truth {
				sc := g.scenario(tc.model, tc.r, tc.c, defaultSettings()[2], Noise{}, 1)
				sc.Timeline, sc.DurationS, sc.StepS = nil, 40, step
				_, tr, err := simulator.Run(sc)
				if err != nil || len(tr) < 5 {
					t.Fatalf("%v, %d breaths", err, len(tr))
				}
				return tr[len(tr)-1]
			}
			fine, coarse := last(0.0005), last(g.StepS)
			t.Logf("trapped %.2f / %.2f mL, intrinsic PEEP %.3f / %.3f cmH2O, peak %.2f / %.2f cmH2O (0.5 ms / %g s)", fine.TrappedML, coarse.TrappedML, fine.PEEPiCmH2O, coarse.PEEPiCmH2O, fine.PeakCmH2O, coarse.PeakCmH2O, g.StepS)
			if d := math.Abs(coarse.TrappedML - fine.TrappedML); d > math.Max(2, 0.01*math.Abs(fine.TrappedML)) {
				t.Errorf("trapped volume %.2f mL at %g s, %.2f mL at 0.5 ms", coarse.TrappedML, g.StepS, fine.TrappedML)
			}
			if d := math.Abs(coarse.PEEPiCmH2O - fine.PEEPiCmH2O); d > math.Max(0.05, 0.01*math.Abs(fine.PEEPiCmH2O)) {
				t.Errorf("intrinsic PEEP %.3f at %g s, %.3f at 0.5 ms", coarse.PEEPiCmH2O, g.StepS, fine.PEEPiCmH2O)
			}
			if d := math.Abs(coarse.PeakCmH2O - fine.PeakCmH2O); d > math.Max(0.2, 0.01*fine.PeakCmH2O) {
				t.Errorf("peak %.2f at %g s, %.2f at 0.5 ms", coarse.PeakCmH2O, g.StepS, fine.PeakCmH2O)
			}
		})
	}
}

// TestNoPerSampleAllocation checks that a patient's run allocates per
// breath and per second (records, findings, events), not per sample: the
// same patient at four times the sample rate allocates about as often.
func TestNoPerSampleAllocation(t *testing.T) {
	g := tinyGrid()
	sets := []DetectorSet{DefaultDetectorSet()}
	run := func(rateHz float64) (allocs float64, samples int64) {
		sc := g.scenario(ModelLinear, 35, 50, g.Settings[0], g.Noise[0], 1)
		sc.Timeline, sc.SampleRateHz = nil, rateHz
		c := &Case{Name: "alloc", scenario: sc}
		allocs = testing.AllocsPerRun(1, func() {
			r, err := runCase(t.Context(), c, sets, analyze.DefaultConfig(), nil, nil)
			if err != nil {
				t.Fatal(err)
			}
			samples = r.Samples
		})
		return allocs, samples
	}
	a50, n50 := run(50)
	a200, n200 := run(200)
	if n200 < 4*n50-10 || a200 > 1.2*a50+200 {
		t.Errorf("%v allocations for %d samples at 50 Hz, %v for %d at 200 Hz", a50, n50, a200, n200)
	}
}

// TestCaseScoreByHand scores a made-up run whose figures are counted by
// hand: 20 breaths of 3 s, the condition on breaths 5–12 (0-based), the
// alarm raised at the end of breath 8 and cleared at the end of breath 15.
func TestCaseScoreByHand(t *testing.T) {
	ci := indexOf(Scored(), analyze.CondAirTrapping)
	truth := make([]TruthBreath, 20)
	for i := range truth {
		truth[i].StartS, truth[i].EndS = float64(3*i), float64(3*i+3)
		if i >= 5 && i <= 12 {
			truth[i].Labels = 1 << ci
		}
	}
	ev := []AlertEvent{
		{Condition: analyze.CondAirTrapping, State: "raised", TS: truth[8].EndS, Fresh: true},
		{Condition: analyze.CondAirTrapping, State: "escalated", TS: truth[10].EndS},
		{Condition: analyze.CondAirTrapping, State: "cleared", TS: truth[15].EndS},
		{Condition: analyze.CondHighPeakPressure, State: "raised", TS: truth[1].EndS, Fresh: true},
	}
	ep := Episodes{MinBreaths: 6, MatchTolS: 0.3}
	var sc ConditionScore
	caseScore(truth, ev, ci, ep, &sc)
	sc.finish(1)
	// Alarmed breaths 8–14: TP 8–12 (5), FN 5–7 (3), FP 13–14 (2), TN 10.
	if b := sc.Breath; b.TP != 5 || b.FN != 3 || b.FP != 2 || b.TN != 10 {
		t.Errorf("breaths %+v, want tp 5, fn 3, fp 2, tn 10", b)
	}
	// Episodes: positive 5–12 detected; negative 0–4 is too short, 13–19
	// clean.
	if e := sc.Episode; e.Positive != 1 || e.Detected != 1 || e.Negative != 1 || e.Clean != 1 {
		t.Errorf("episodes %+v", e)
	}
	// Onset: end of breath 5 (18 s) to the raise (27 s), 3 breaths later;
	// clearing: end of breath 12 (39 s) to the clearing (48 s).
	if sc.Onset.N != 1 || sc.Onset.MedianS != 9 || sc.Onset.MedianBreaths != 3 {
		t.Errorf("onset %+v, want 9 s and 3 breaths", sc.Onset)
	}
	if sc.Clearing.N != 1 || sc.Clearing.MedianS != 9 {
		t.Errorf("clearing %+v, want 9 s", sc.Clearing)
	}
	if sc.Alerts != 1 || sc.FalseAlerts != 0 || sc.FalseAlertsPerHour != 0 {
		t.Errorf("alerts %d, false %d (%v per hour), want 1, 0", sc.Alerts, sc.FalseAlerts, sc.FalseAlertsPerHour)
	}
	// Intrinsic PEEP 0 on every breath: all 20 in the first bin, 7 alarmed.
	if sc.Curve[0].Breaths != 20 || sc.Curve[0].Alarmed != 7 {
		t.Errorf("curve bin 0 %+v", sc.Curve[0])
	}
	// A raise whose span holds only grey-zone breaths (true intrinsic PEEP
	// 1–2 cmH2O) is a grey raise, one over breaths below 1 cmH2O is false.
	for _, tc := range []struct {
		peepi        float64
		grey, falseN int
	}{{1.7, 1, 0}, {0.5, 0, 1}} {
		gt := make([]TruthBreath, 20)
		for i := range gt {
			gt[i].StartS, gt[i].EndS = float64(3*i), float64(3*i+3)
			gt[i].PEEPiCmH2O = tc.peepi
		}
		var g ConditionScore
		caseScore(gt, ev[:3], ci, ep, &g)
		if g.Alerts != 1 || g.GreyAlerts != tc.grey || g.FalseAlerts != tc.falseN {
			t.Errorf("PEEPi %v: alerts %d, grey %d, false %d; want 1, %d, %d", tc.peepi, g.Alerts, g.GreyAlerts, g.FalseAlerts, tc.grey, tc.falseN)
		}
	}
	// A raise with no breath of the condition in its span is false.
	var fp ConditionScore
	caseScore(truth, ev, indexOf(Scored(), analyze.CondHighPeakPressure), ep, &fp)
	if fp.Alerts != 1 || fp.FalseAlerts != 1 {
		t.Errorf("high-peak alerts %d, false %d; want 1, 1", fp.Alerts, fp.FalseAlerts)
	}
}

// FuzzParseGrid feeds arbitrary grid files to the parser and the
// expansion: neither may panic, and an accepted grid expands into valid
// cases or a list of problems.
func FuzzParseGrid(f *testing.F) {
	files, err := filepath.Glob(filepath.Join("testdata", "*.yaml"))
	if err != nil || len(files) == 0 {
		f.Fatalf("no seeds in testdata: %v", err)
	}
	for _, name := range files {
		data, err := os.ReadFile(name)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(data)
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		g, err := ParseGrid(data)
		if err != nil {
			return
		}
		// Keep each expansion small: the fuzzer should test parsing and
		// validation, not build large plans.
		if g.Seeds*len(g.Models)*len(g.ResistanceCmH2OSPerL)*len(g.ComplianceMLPerCmH2O)*len(g.Settings)*len(g.Noise) > 50 {
			return
		}
		plan, err := g.Expand()
		if err == nil && len(plan.Cases) == 0 {
			t.Error("an accepted grid expanded to no cases")
		}
	})
}

// TestTestdataGrids expands the example grids in testdata.
func TestTestdataGrids(t *testing.T) {
	for _, tc := range []struct {
		file  string
		cases int
	}{{"small.yaml", 4}, {"pressure-control.yaml", 12}} {
		t.Run(tc.file, func(t *testing.T) {
			g, err := LoadGrid(filepath.Join("testdata", tc.file))
			if err != nil {
				t.Fatal(err)
			}
			plan, err := g.Expand()
			if err != nil {
				t.Fatal(err)
			}
			if len(plan.Cases) != tc.cases {
				t.Errorf("%d cases, want %d", len(plan.Cases), tc.cases)
			}
		})
	}
}

// TestSampleRates runs one patient at two sample rates: the scores by rate
// partition the overall counts.
func TestSampleRates(t *testing.T) {
	g := tinyGrid()
	g.Models, g.ResistanceCmH2OSPerL, g.Scenarios = []string{ModelLinear}, []float64{35}, nil
	g.SampleRatesHz = []float64{50, 100}
	res := runGrid(t, g)
	sum := Summarize(res)
	set := sum.Sets[0]
	if len(set.BySampleRate) != 2 || set.BySampleRate[1].SampleRateHz != 100 {
		t.Fatalf("by sample rate: %+v", set.BySampleRate)
	}
	for ci, c := range set.Conditions {
		a, b := set.BySampleRate[0].Conditions[ci].Breath, set.BySampleRate[1].Conditions[ci].Breath
		if a.TP+b.TP != c.Breath.TP || a.FP+b.FP != c.Breath.FP || a.TN+b.TN != c.Breath.TN || a.FN+b.FN != c.Breath.FN {
			t.Errorf("%s: %+v + %+v ≠ %+v", c.Condition, a, b, c.Breath)
		}
	}
	if res.Cases[1].Samples < 2*res.Cases[0].Samples-10 {
		t.Errorf("samples %d at 50 Hz, %d at 100 Hz", res.Cases[0].Samples, res.Cases[1].Samples)
	}
}

// TestExpHoldsScored runs a linear patient that traps air (R 35 under the
// tiny grid's short expiration) and one that does not (R 10) with a 3 s
// hold every 30 s, and checks the per-class hold figures against a count
// made here from the raw truth and estimates: every passive hold breath
// matched, none missed where the true intrinsic PEEP shows, none taken for
// a hold without one, and the held breaths read within ±1 cmH2O of the
// static truth (a linear lung settles at once in a hold).
func TestExpHoldsScored(t *testing.T) {
	g := tinyGrid()
	g.Models = []string{ModelLinear}
	g.Scenarios = nil
	g.ExpHolds = ExpHolds{EveryS: 30, DurationS: 20}
	if _, err := g.Expand(); err == nil || !strings.Contains(err.Error(), "exp_holds") {
		t.Fatalf("a hold of 20 s every 30 s: %v, want an error naming exp_holds", err)
	}
	g.ExpHolds = ExpHolds{EveryS: 30, DurationS: 3}
	res := runGrid(t, g)
	var n, within, visible int
	for _, c := range res.Cases {
		for _, e := range c.Estimates {
			tr := c.Truth[e.Truth]
			if !tr.Hold || !tr.Passive || math.IsNaN(float64(e.PEEPiCmH2O)) {
				continue
			}
			n++
			if math.Abs(float64(e.PEEPiCmH2O)-tr.PEEPiCmH2O) <= PEEPiTolCmH2O {
				within++
			}
			if tr.PEEPiCmH2O >= HoldVisibleCmH2O {
				visible++
			}
		}
	}
	var all *ClassScore
	for _, cs := range classScores(res, 0) {
		if cs.Class == "all" {
			all = &cs
		}
	}
	// 4 minutes, a hold every 30 s from 30 s: 7 per patient.
	if all == nil || all.Holds == nil || n < 12 || visible < 6 || all.Holds.N != n {
		t.Fatalf("holds: class %+v, counted %d (%d with a visible intrinsic PEEP)", all, n, visible)
	}
	if h := all.Holds; h.Missed != 0 || h.False != 0 || h.Unsettled != 0 || within != n || float64(h.Within) != 1 {
		t.Errorf("holds: %d, within ±1 cmH2O %d (class %.3f), missed %d, false %d, unsettled %d",
			n, within, float64(h.Within), h.Missed, h.False, h.Unsettled)
	}
	// The report's hold table carries the class's row.
	var page bytes.Buffer
	if err := WriteReport(&page, res, Summarize(res), nil); err != nil {
		t.Fatal(err)
	}
	if row := fmt.Sprintf("<tr><td>all</td><td>%d</td>", n); !strings.Contains(page.String(), "End-expiratory holds by class") || !strings.Contains(page.String(), row) {
		t.Errorf("report: no hold table with the row %q", row)
	}
	// The same grid without holds has no hold figures.
	g.ExpHolds = ExpHolds{}
	for _, cs := range classScores(runGrid(t, g), 0) {
		if cs.Holds != nil {
			t.Errorf("class %s of a grid without holds: %+v", cs.Class, *cs.Holds)
		}
	}
}
