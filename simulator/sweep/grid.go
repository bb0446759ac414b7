package sweep

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"reflect"
	"strings"

	"go.yaml.in/yaml/v3"

	"trapline/simulator"
)

// Patient models of a grid. Each turns a nominal resistance R and
// compliance C into a simulator.Patient whose equivalent mechanics are R and
// C (see Grid.patient for the exact mapping).
const (
	// ModelLinear is the linear single compartment.
	ModelLinear = "linear"
	// ModelRohrer is a single compartment with flow-dependent resistance
	// (Rohrer 1915): half of R is linear, half grows with flow so that the
	// resistance equals R at RohrerRefFlowLPS.
	ModelRohrer = "rohrer"
	// ModelTwoCompartment is two parallel units of C/2 each behind a shared
	// airway resistance, with unit resistances that differ fourfold, so the
	// exhalation is bi-exponential.
	ModelTwoCompartment = "two-compartment"
	// ModelTwoCompartment3 and ModelTwoCompartment10 are the same with
	// unit time constants that differ threefold and tenfold.
	ModelTwoCompartment3  = "two-compartment-3x"
	ModelTwoCompartment10 = "two-compartment-10x"
	// ModelFlowLimited is the linear model with an expiratory flow cap that
	// falls as the lung empties.
	ModelFlowLimited = "flow-limited"
	// ModelEffort is the linear model with an inspiratory muscle effort at
	// the ventilator's rate.
	ModelEffort = "effort"
	// ModelScenario marks the cases that run a shipped or file scenario.
	ModelScenario = "scenario"
)

// Models lists the grid's patient models in report order.
func Models() []string {
	return []string{ModelLinear, ModelRohrer, ModelTwoCompartment, ModelTwoCompartment3, ModelTwoCompartment10, ModelFlowLimited, ModelEffort}
}

// Model constants of the non-linear patients (our choice: values that make
// each model's signature visible at adult settings without leaving the
// range of adult mechanics).
const (
	// RohrerRefFlowLPS is the flow at which the Rohrer resistance equals
	// the nominal R: 0.8 L/s (48 L/min), a typical inspiratory flow.
	RohrerRefFlowLPS = 0.8
	// FlowLimitLPS and FlowLimitSlopePerS set the expiratory flow cap of
	// the flow-limited model: 0.1 L/s at relaxation, rising 0.8 L/s per
	// litre above it.
	FlowLimitLPS       = 0.1
	FlowLimitSlopePerS = 0.8
	// EffortCmH2O is the peak muscle pressure of the effort model.
	EffortCmH2O = 5.0
)

// Setting is one set of ventilator settings of a grid, with a short name
// for the report.
type Setting struct {
	Name                 string `yaml:"name"`
	simulator.Ventilator `yaml:",inline"`
}

// Noise is one sensor of a grid (noise, offsets, quantization), with a
// short name for the report.
type Noise struct {
	Name             string `yaml:"name"`
	simulator.Sensor `yaml:",inline"`
}

// CourseStep changes every grid patient's mechanics during the run, so
// that conditions start and end and latencies can be measured: from
// AtFraction of the duration on, the resistances are ResistanceFactor
// times the nominal ones and the compliances ComplianceFactor times,
// reached linearly over RampS. A factor of zero means 1.
type CourseStep struct {
	AtFraction       float64           `yaml:"at_fraction"`
	RampS            simulator.Seconds `yaml:"ramp"`
	ResistanceFactor float64           `yaml:"resistance_factor"`
	ComplianceFactor float64           `yaml:"compliance_factor"`
	// Ventilator changes ventilator settings (timeline keys of the
	// simulator, e.g. rate_bpm, peep_cmh2o) at the same moment: a settings
	// change mid-recording.
	Ventilator map[string]float64 `yaml:"ventilator"`
}

// ExpHolds schedules end-expiratory holds on every grid patient: one of
// DurationS every EveryS from EveryS on (zero EveryS: none), each at the
// end of the first expiration that ends after its time.
type ExpHolds struct {
	EveryS    simulator.Seconds `yaml:"every"`
	DurationS simulator.Seconds `yaml:"duration"`
}

// Episodes holds the rules that turn per-breath truth into episodes.
type Episodes struct {
	// MinBreaths is the shortest run of breaths that counts as an episode
	// (positive or negative); shorter runs count per breath only.
	MinBreaths int `yaml:"min_breaths"`
	// GraceBreaths lets an alarm that becomes active up to this many
	// breaths after a positive episode still count as detecting it.
	GraceBreaths int `yaml:"grace_breaths"`
	// MatchTolS is how long after a breath's true end an alert event still
	// belongs to that breath (the analyzer completes a breath when the next
	// inspiration is confirmed, a little after it started).
	MatchTolS float64 `yaml:"match_tol_s"`
}

// Grid describes a sweep: the product of patient models, resistances,
// compliances, settings, noise levels and seeds, each patient run for
// DurationS with the mechanics course applied, plus the listed scenarios
// (each once per seed).
type Grid struct {
	// DurationS is the simulated length of each grid patient.
	DurationS simulator.Seconds `yaml:"duration"`
	// SampleRatesHz are the sample rates; every patient, scenarios
	// included, runs at each of them.
	SampleRatesHz []float64 `yaml:"sample_rates_hz"`
	// StepS is the Runge–Kutta step of the non-linear models (zero: the
	// simulator's default).
	StepS float64 `yaml:"step_s"`
	// Seeds is the number of repetitions with different sensor seeds.
	Seeds int `yaml:"seeds"`

	Models               []string     `yaml:"models"`
	ResistanceCmH2OSPerL []float64    `yaml:"resistance_cmh2o_s_per_l"`
	ComplianceMLPerCmH2O []float64    `yaml:"compliance_ml_per_cmh2o"`
	Settings             []Setting    `yaml:"settings"`
	Noise                []Noise      `yaml:"noise"`
	Course               []CourseStep `yaml:"course"`
	// ExpHolds adds end-expiratory holds to every grid patient.
	ExpHolds ExpHolds `yaml:"exp_holds"`
	// Scenarios are shipped scenario names or YAML paths; "all" expands to
	// every shipped scenario.
	Scenarios []string `yaml:"scenarios"`
	// ScenarioDurationS, when set, replaces each scenario's own duration.
	ScenarioDurationS simulator.Seconds `yaml:"scenario_duration"`

	Episodes Episodes `yaml:"episodes"`
}

// DefaultEpisodes returns the default episode rules: 6 breaths (the M of
// the default air-trapping rule), no grace, and 0.3 s of matching
// tolerance (a few samples at 50 Hz plus the analyzer's 50 ms hold).
func DefaultEpisodes() Episodes {
	return Episodes{MinBreaths: 6, GraceBreaths: 0, MatchTolS: 0.3}
}

// QuickGrid is a small grid that runs in well under a minute on two cores:
// every model, two resistances, two compliances, two settings, both noise
// levels, 10-minute patients, and the shipped scenarios.
func QuickGrid() Grid {
	g := DefaultGrid()
	g.DurationS = 10 * 60
	g.ResistanceCmH2OSPerL = []float64{10, 30}
	g.ComplianceMLPerCmH2O = []float64{40, 70}
	g.Settings = []Setting{g.Settings[1], g.Settings[2]}
	return g
}

// ParseGrid decodes a grid from YAML. Keys left out keep the values of
// DefaultGrid; unknown keys are errors.
func ParseGrid(data []byte) (Grid, error) {
	g := DefaultGrid()
	// Lists are replaced, not merged: clear them before decoding so that a
	// file that names two models gets two models.
	var probe map[string]any
	if err := yaml.Unmarshal(data, &probe); err != nil {
		return Grid{}, fmt.Errorf("decode grid: %w", simulator.ExplainYAML(err, data, reflect.TypeFor[Grid]()))
	}
	for k := range probe {
		switch k {
		case "models":
			g.Models = nil
		case "resistance_cmh2o_s_per_l":
			g.ResistanceCmH2OSPerL = nil
		case "compliance_ml_per_cmh2o":
			g.ComplianceMLPerCmH2O = nil
		case "settings":
			g.Settings = nil
		case "noise":
			g.Noise = nil
		case "course":
			g.Course = nil
		case "scenarios":
			g.Scenarios = nil
		case "sample_rates_hz":
			g.SampleRatesHz = nil
		}
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	// An empty file (io.EOF) means the default grid.
	if err := dec.Decode(&g); err != nil && !errors.Is(err, io.EOF) {
		return Grid{}, fmt.Errorf("decode grid: %w", simulator.ExplainYAML(err, data, reflect.TypeFor[Grid]()))
	}
	return g, nil
}

// LoadGrid reads a grid file.
func LoadGrid(path string) (Grid, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return Grid{}, fmt.Errorf("read grid: %w", err)
	}
	g, err := ParseGrid(data)
	if err != nil {
		return Grid{}, fmt.Errorf("%s: %w", path, err)
	}
	return g, nil
}

// MaxCases bounds the grid patients of one plan, so that a typo in a grid
// file cannot ask for billions of them.
const MaxCases = 100000

// Case is one simulated patient of a plan.
type Case struct {
	// Index is the position in the plan.
	Index int `json:"index"`
	// Name identifies the case, e.g. "rohrer/R25/C50/vt500-rr20/clean/50Hz/s1".
	Name string `json:"name"`
	// Model is one of Models() or ModelScenario.
	Model string `json:"model"`
	// Scenario names the scenario of a scenario case.
	Scenario string `json:"scenario,omitempty"`
	// RCmH2OSPerL and CMLPerCmH2O are the nominal mechanics of a grid case
	// (zero for scenarios).
	RCmH2OSPerL float64 `json:"r_cmh2o_s_per_l,omitempty"`
	CMLPerCmH2O float64 `json:"c_ml_per_cmh2o,omitempty"`
	Setting     string  `json:"setting,omitempty"`
	Noise       string  `json:"noise,omitempty"`
	// SampleRateHz is the sample rate of the patient.
	SampleRateHz float64 `json:"sample_rate_hz"`
	Seed         uint64  `json:"seed"`
	// DurationS is the simulated length.
	DurationS float64 `json:"duration_s"`

	scenario simulator.Scenario
}

// SimScenario returns the scenario the case runs.
func (c *Case) SimScenario() simulator.Scenario { return c.scenario }

// Plan is the expanded grid: every case, validated.
type Plan struct {
	Grid  Grid
	Cases []Case
}

// TotalS is the simulated time of the whole plan.
func (p *Plan) TotalS() float64 {
	s := 0.0
	for i := range p.Cases {
		s += p.Cases[i].DurationS
	}
	return s
}

// Expand turns the grid into a plan and validates every case, reporting
// every problem at once.
func (g Grid) Expand() (*Plan, error) {
	var errs []error
	bad := func(format string, args ...any) { errs = append(errs, fmt.Errorf(format, args...)) }
	g.checkFields(bad)
	if n := g.Seeds * len(g.SampleRatesHz) * len(g.Models) * len(g.ResistanceCmH2OSPerL) * len(g.ComplianceMLPerCmH2O) * len(g.Settings) * len(g.Noise); len(errs) == 0 && n > MaxCases {
		bad("the grid has %d patients, more than %d: split it", n, MaxCases)
	}
	if len(errs) > 0 {
		return nil, errors.Join(errs...)
	}

	p := &Plan{Grid: g}
	add := func(c Case) {
		c.Index = len(p.Cases)
		c.scenario.Stream = fmt.Sprintf("sweep-%d", c.Index)
		c.DurationS = float64(c.scenario.DurationS)
		if err := c.scenario.Validate(); err != nil {
			bad("%s: %w", c.Name, err)
			return
		}
		p.Cases = append(p.Cases, c)
	}
	for seed := 1; seed <= g.Seeds; seed++ {
		for _, hz := range g.SampleRatesHz {
			for _, m := range g.Models {
				for _, r := range g.ResistanceCmH2OSPerL {
					for _, c := range g.ComplianceMLPerCmH2O {
						for _, st := range g.Settings {
							for _, n := range g.Noise {
								sc := g.scenario(m, r, c, st, n, uint64(seed))
								sc.SampleRateHz = hz
								add(Case{
									Name:  fmt.Sprintf("%s/R%g/C%g/%s/%s/%gHz/s%d", m, r, c, st.Name, n.Name, hz, seed),
									Model: m, RCmH2OSPerL: r, CMLPerCmH2O: c, Setting: st.Name, Noise: n.Name,
									SampleRateHz: hz, Seed: uint64(seed), scenario: sc,
								})
							}
						}
					}
				}
			}
		}
	}
	g.addScenarios(add, bad)
	if len(errs) > 0 {
		return nil, errors.Join(errs...)
	}
	if len(p.Cases) == 0 {
		return nil, errors.New("the grid has no patients: give models or scenarios")
	}
	return p, nil
}

// checkFields reports to bad every grid field out of range, each
// prefixed by its key.
func (g Grid) checkFields(bad func(format string, args ...any)) {
	if len(g.SampleRatesHz) == 0 {
		bad("sample_rates_hz: needs at least one rate")
	}
	for i, r := range g.SampleRatesHz {
		if !(r >= 25 && r <= 1000) {
			bad("sample_rates_hz[%d]: %g out of range [25, 1000]", i, r)
		}
	}
	if !(g.StepS >= 0 && g.StepS <= 0.01) {
		bad("step_s: %g out of range [0, 0.01]", g.StepS)
	}
	if g.Seeds < 1 || g.Seeds > 1000 {
		bad("seeds: %d out of range [1, 1000]", g.Seeds)
	}
	gridPatients := len(g.Models) > 0
	if gridPatients {
		if !(g.DurationS >= 30 && g.DurationS <= 7*86400) {
			bad("duration: %gs out of range [30s, 168h]", float64(g.DurationS))
		}
		if len(g.ResistanceCmH2OSPerL) == 0 || len(g.ComplianceMLPerCmH2O) == 0 || len(g.Settings) == 0 || len(g.Noise) == 0 {
			bad("resistance_cmh2o_s_per_l, compliance_ml_per_cmh2o, settings, noise: each needs at least one entry when models are given")
		}
	}
	for i, m := range g.Models {
		switch m {
		case ModelLinear, ModelRohrer, ModelTwoCompartment, ModelTwoCompartment3, ModelTwoCompartment10, ModelFlowLimited, ModelEffort:
		default:
			bad("models[%d]: unknown model %q (want %s)", i, m, strings.Join(Models(), ", "))
		}
	}
	for i, st := range g.Course {
		if !(st.AtFraction >= 0 && st.AtFraction < 1) {
			bad("course[%d].at_fraction: %g out of range [0, 1)", i, st.AtFraction)
		}
		if !(st.RampS >= 0) || !(st.ResistanceFactor >= 0 && st.ResistanceFactor <= 20) || !(st.ComplianceFactor >= 0 && st.ComplianceFactor <= 20) {
			bad("course[%d]: ramp must not be negative and factors must be in [0, 20]", i)
		}
	}
	if h := g.ExpHolds; h.EveryS != 0 && !(h.EveryS >= 10 && h.DurationS > 0 && h.DurationS <= simulator.MaxExpiratoryHoldS && h.DurationS < h.EveryS/2) {
		bad("exp_holds: every must be at least 10s and duration in (0, %gs] and under half of every", simulator.MaxExpiratoryHoldS)
	}
	for i, n := range g.Settings {
		if n.Name == "" {
			bad("settings[%d].name: empty", i)
		}
	}
	for i, n := range g.Noise {
		if n.Name == "" {
			bad("noise[%d].name: empty", i)
		}
	}
	ep := g.Episodes
	if ep.MinBreaths < 1 || ep.MinBreaths > 1000 || ep.GraceBreaths < 0 || ep.GraceBreaths > 1000 || !(ep.MatchTolS >= 0 && ep.MatchTolS <= 5) {
		bad("episodes: min_breaths in [1, 1000], grace_breaths in [0, 1000], match_tol_s in [0, 5]")
	}
	if !(g.ScenarioDurationS >= 0) {
		bad("scenario_duration: must not be negative")
	}
}

// addScenarios passes to add the cases of the scenarios the grid names
// ("all": every shipped one), one per seed and rate; load errors go to bad.
func (g Grid) addScenarios(add func(Case), bad func(format string, args ...any)) {
	var names []string
	for _, s := range g.Scenarios {
		if s == "all" {
			names = append(names, simulator.ShippedNames()...)
		} else {
			names = append(names, s)
		}
	}
	for _, name := range names {
		base, err := simulator.LoadScenario(name)
		if err != nil {
			bad("scenarios: %w", err)
			continue
		}
		for seed := 1; seed <= g.Seeds; seed++ {
			for _, hz := range g.SampleRatesHz {
				sc := base
				sc.Seed = base.Seed*1000 + uint64(seed)
				sc.SampleRateHz = hz
				if g.StepS > 0 {
					sc.StepS = g.StepS
				}
				if g.ScenarioDurationS > 0 {
					sc.DurationS = g.ScenarioDurationS
				}
				label := base.Name
				if label == "" {
					label = name
				}
				add(Case{Name: fmt.Sprintf("scenario/%s/%gHz/s%d", label, hz, seed), Model: ModelScenario, Scenario: label,
					SampleRateHz: hz, Seed: sc.Seed, scenario: sc})
			}
		}
	}
}

// scenario builds the simulated patient of one grid point.
func (g *Grid) scenario(model string, r, c float64, st Setting, n Noise, seed uint64) simulator.Scenario {
	sc := simulator.NewScenario()
	sc.Name = model
	sc.Seed = seed*7919 + uint64(math.Round(r*1000+c))
	sc.DurationS = g.DurationS
	sc.SampleRateHz = g.SampleRatesHz[0]
	sc.StepS = g.StepS
	sc.Ventilator = st.Ventilator
	sc.Sensor = n.Sensor
	sc.Patient = patient(model, r, c, 1, 1)
	dur := float64(g.DurationS)
	for _, cs := range g.Course {
		rf, cf := cs.ResistanceFactor, cs.ComplianceFactor
		if rf == 0 {
			rf = 1
		}
		if cf == 0 {
			cf = 1
		}
		st := simulator.Step{AtS: simulator.Seconds(cs.AtFraction * dur), RampS: cs.RampS, Ventilator: cs.Ventilator}
		// A step that only changes settings leaves the mechanics alone.
		if cs.ResistanceFactor != 0 || cs.ComplianceFactor != 0 || len(cs.Ventilator) == 0 {
			st.Patient = patientKeys(patient(model, r, c, rf, cf))
		}
		sc.Timeline = append(sc.Timeline, st)
	}
	if h := g.ExpHolds; h.EveryS > 0 {
		for at := h.EveryS; at < g.DurationS; at += h.EveryS {
			sc.Timeline = append(sc.Timeline, simulator.Step{AtS: at, Event: simulator.EventExpiratoryHold, DurationS: h.DurationS})
		}
	}
	return sc
}
