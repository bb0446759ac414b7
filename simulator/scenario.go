package simulator

import (
	"bytes"
	"embed"
	"errors"
	"fmt"
	"io/fs"
	"math"
	"os"
	"path"
	"reflect"
	"sort"
	"strconv"
	"strings"
	"time"

	"go.yaml.in/yaml/v3"
)

// Scenario is a scripted simulated patient: the patient, the ventilator
// settings and the sensor at the start, and a timeline of changes and
// events. Load one from YAML with LoadScenario or Shipped, or build one in
// code (Steady is a shortcut for the common case).
type Scenario struct {
	// Name identifies the scenario; Description says what it shows.
	Name        string `yaml:"name"`
	Description string `yaml:"description"`
	// Stream is the stream id written with the samples; "sim" when empty.
	Stream string `yaml:"stream"`
	// Seed seeds the sensor's random numbers: the same seed gives the same
	// samples, byte for byte.
	Seed uint64 `yaml:"seed"`
	// DurationS is the simulated length in seconds.
	DurationS Seconds `yaml:"duration"`
	// SampleRateHz is the output sample rate, 25–1000 Hz.
	SampleRateHz float64 `yaml:"sample_rate_hz"`
	// StepS fixes the step of the Runge–Kutta integrator used by the
	// non-linear models; zero chooses it per breath (see DefaultStepS).
	StepS float64 `yaml:"step_s"`

	Patient    Patient    `yaml:"patient"`
	Ventilator Ventilator `yaml:"ventilator"`
	Sensor     Sensor     `yaml:"sensor"`
	// Timeline lists the changes and events in time order.
	Timeline []Step `yaml:"timeline"`
}

// Event kinds of a timeline step.
const (
	// EventDisconnect stops the samples (the signal link is lost) for
	// Duration, or until an EventReconnect when Duration is zero.
	EventDisconnect = "disconnect"
	// EventReconnect brings the samples back.
	EventReconnect = "reconnect"
	// EventArtifact adds a burst of large noise for Duration.
	EventArtifact = "artifact"
	// EventExpiratoryHold shuts both valves for Duration at the end of the
	// first expiration that ends at or after At (an end-expiratory
	// occlusion): no flow, the units equilibrate, and the airway pressure
	// rises to the static total PEEP. The next breath follows the hold.
	EventExpiratoryHold = "expiratory_hold"
)

// MaxExpiratoryHoldS is the longest expiratory hold a scenario may ask for.
const MaxExpiratoryHoldS = 20.0

// Step is one entry of a scenario's timeline: from At on, the listed
// settings move to new values, at once or linearly over Ramp; or an event
// happens.
type Step struct {
	// AtS is the time of the step from the start of the scenario.
	AtS Seconds `yaml:"at"`
	// RampS spreads the change linearly over this time (zero: a step).
	RampS Seconds `yaml:"ramp"`
	// Patient, Ventilator and Sensor map numeric setting keys (as in the
	// sections of the scenario) to their new values.
	Patient    map[string]float64 `yaml:"patient"`
	Ventilator map[string]float64 `yaml:"ventilator"`
	Sensor     map[string]float64 `yaml:"sensor"`
	// Event is EventDisconnect, EventReconnect, EventArtifact or
	// EventExpiratoryHold, or empty.
	Event string `yaml:"event"`
	// DurationS is the length of a disconnection, artifact burst or hold.
	DurationS Seconds `yaml:"duration"`
	// ArtifactPressureCmH2O and ArtifactFlowLPM are the noise standard
	// deviations of an artifact burst; zero means 8 cmH2O and 40 L/min.
	ArtifactPressureCmH2O float64 `yaml:"pressure_cmh2o"`
	ArtifactFlowLPM       float64 `yaml:"flow_lpm"`
	// Labels are added to the ground truth of every breath that overlaps
	// the step (its ramp, or its event's duration).
	Labels []string `yaml:"labels"`
	// Note is a free comment carried into logs.
	Note string `yaml:"note"`
}

// Seconds is a time in seconds that YAML may write as a number of seconds
// or as a Go duration ("90s", "2m", "1h30m").
type Seconds float64

// UnmarshalYAML accepts a number or a duration string.
func (s *Seconds) UnmarshalYAML(n *yaml.Node) error {
	if n.Kind != yaml.ScalarNode {
		return fmt.Errorf("line %d: want seconds or a duration such as 90s or 2m", n.Line)
	}
	if f, err := strconv.ParseFloat(n.Value, 64); err == nil {
		*s = Seconds(f)
		return nil
	}
	d, err := time.ParseDuration(n.Value)
	if err != nil {
		return fmt.Errorf("line %d: %q: want seconds or a duration such as 90s or 2m", n.Line, n.Value)
	}
	*s = Seconds(d.Seconds())
	return nil
}

// MarshalYAML writes the time as a duration string.
func (s Seconds) MarshalYAML() (any, error) {
	return time.Duration(float64(s) * float64(time.Second)).String(), nil
}

// DefaultStepS is the largest Runge–Kutta step of the non-linear models
// (2 ms). Each breath takes the smaller of it and a twentieth of the
// shortest time constant of its model, never less than MinStepS; at such
// steps the error of fourth-order Runge–Kutta is far below the 0.5 % the
// tests allow, and halving the step changes the trapped volume by less
// than that (checked by the model tests).
const DefaultStepS = 0.002

// MinStepS is the smallest automatic Runge–Kutta step.
const MinStepS = 0.00005

// NewScenario returns a scenario with the defaults that a YAML file starts
// from: a 100 Hz perfect sensor, a passive single-compartment patient and a
// square-flow volume-control ventilator, all values still to be set.
func NewScenario() Scenario {
	return Scenario{
		Stream:       "sim",
		SampleRateHz: 100,
		Patient: Patient{
			Model:                   ModelSingle,
			ExpResistanceCmH2OSPerL: math.NaN(),
			ExpK2CmH2OS2PerL2:       math.NaN(),
		},
		Ventilator: Ventilator{Mode: ModeVC, FlowPattern: FlowSquare},
	}
}

// ParseScenario decodes a scenario from YAML. Unknown keys are errors.
func ParseScenario(data []byte) (Scenario, error) {
	sc := NewScenario()
	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	if err := dec.Decode(&sc); err != nil {
		return Scenario{}, fmt.Errorf("decode scenario: %w", ExplainYAML(err, data, reflect.TypeFor[Scenario]()))
	}
	return sc, nil
}

//go:embed scenarios/*.yaml
var shipped embed.FS

// ShippedNames lists the scenarios built into the program.
func ShippedNames() []string {
	entries, err := fs.ReadDir(shipped, "scenarios")
	if err != nil {
		return nil
	}
	var names []string
	for _, e := range entries {
		if n, ok := strings.CutSuffix(e.Name(), ".yaml"); ok {
			names = append(names, n)
		}
	}
	sort.Strings(names)
	return names
}

// Shipped returns a scenario built into the program by name.
func Shipped(name string) (Scenario, error) {
	data, err := shipped.ReadFile(path.Join("scenarios", name+".yaml"))
	if err != nil {
		return Scenario{}, fmt.Errorf("scenario %q: %w (shipped: %s)", name, ErrUnknownScenario, strings.Join(ShippedNames(), ", "))
	}
	sc, err := ParseScenario(data)
	if err != nil {
		return Scenario{}, fmt.Errorf("scenario %s: %w", name, err)
	}
	return sc, nil
}

// ErrUnknownScenario is returned for a scenario name that is neither
// shipped nor a readable file.
var ErrUnknownScenario = errors.New("unknown scenario")

// LoadScenario loads a shipped scenario by name, or a YAML file by path
// (anything containing a slash or ending in .yaml or .yml).
func LoadScenario(nameOrPath string) (Scenario, error) {
	if !strings.ContainsRune(nameOrPath, '/') && !strings.HasSuffix(nameOrPath, ".yaml") && !strings.HasSuffix(nameOrPath, ".yml") {
		return Shipped(nameOrPath)
	}
	data, err := os.ReadFile(nameOrPath)
	if err != nil {
		return Scenario{}, fmt.Errorf("read scenario: %w", err)
	}
	sc, err := ParseScenario(data)
	if err != nil {
		return Scenario{}, fmt.Errorf("%s: %w", nameOrPath, err)
	}
	return sc, nil
}

// Validate checks the scenario and every state its timeline reaches, and
// reports every problem at once.
func (sc *Scenario) Validate() error {
	_, err := compile(sc)
	return err
}

// change is one compiled setting change: a field moves from From to To
// between the step's start and end.
type change struct {
	section  int // 0 patient, 1 ventilator, 2 sensor
	field    int
	from, to float64
}

// compiledStep is a timeline step with its changes resolved.
type compiledStep struct {
	startS, endS float64
	changes      []change
}

// window is a time interval with a meaning (disconnection, artifact, label).
type window struct {
	startS, endS           float64
	pressureCmH2O, flowLPM float64
	labels                 []string
}

// timeline is a scenario compiled for evaluation.
type timeline struct {
	base       params
	steps      []compiledStep
	disconnect []window
	artifacts  []window
	labeled    []window
	// risingPeak are the ramps that raise the peak pressure.
	risingPeak []window
	// holds are the expiratory holds in time order: each starts at the end
	// of the first expiration that ends at or after startS and lasts
	// endS − startS.
	holds []window
}

// compile validates a scenario and prepares its timeline.
func compile(sc *Scenario) (*timeline, error) {
	var errs []error
	bad := func(format string, args ...any) { errs = append(errs, fmt.Errorf(format, args...)) }
	if !(sc.SampleRateHz >= 25 && sc.SampleRateHz <= 1000) {
		bad("sample_rate_hz: %g out of range [25, 1000]", sc.SampleRateHz)
	}
	if !(sc.DurationS > 0 && sc.DurationS <= 7*24*3600) {
		bad("duration: %gs out of range (0, 7 days]", float64(sc.DurationS))
	}
	if sc.StepS != 0 && !(sc.StepS >= 1e-5 && sc.StepS <= 0.005) {
		bad("step_s: %g out of range [1e-5, 0.005]", sc.StepS)
	}
	tl := &timeline{base: params{Patient: sc.Patient, Ventilator: sc.Ventilator, Sensor: sc.Sensor}}
	tl.base.resolve()
	if err := tl.base.validate(); err != nil {
		errs = append(errs, err)
		return nil, errors.Join(errs...)
	}

	order := make([]int, len(sc.Timeline))
	for i := range order {
		order[i] = i
	}
	sort.SliceStable(order, func(a, b int) bool { return sc.Timeline[order[a]].AtS < sc.Timeline[order[b]].AtS })
	var openDisconnect = -1.0
	for _, i := range order {
		st := sc.Timeline[i]
		key := fmt.Sprintf("timeline[%d]", i)
		at, ramp, dur := float64(st.AtS), float64(st.RampS), float64(st.DurationS)
		if !(at >= 0) || !(ramp >= 0) || !(dur >= 0) || math.IsInf(at+ramp+dur, 0) {
			bad("%s: at, ramp and duration must be finite and not negative", key)
			continue
		}
		cs := compiledStep{startS: at, endS: at + ramp}
		from := tl.at(at) // the values the step starts from
		cs.changes = stepChanges(key, st, from, bad)
		if len(cs.changes) > 0 {
			tl.steps = append(tl.steps, cs)
			after := tl.at(cs.endS)
			if err := after.validate(); err != nil {
				bad("%s: the settings it reaches are invalid: %w", key, err)
			}
			if raisesPeak(cs.changes, after.Ventilator.Mode == ModePC) && ramp > 0 {
				tl.risingPeak = append(tl.risingPeak, window{startS: at, endS: at + ramp})
			}
		}
		end := at + math.Max(ramp, dur)
		openDisconnect = tl.addEvent(key, st, at, dur, openDisconnect, bad)
		if len(st.Labels) > 0 {
			tl.labeled = append(tl.labeled, window{startS: at, endS: end, labels: st.Labels})
		}
	}
	if openDisconnect >= 0 {
		tl.disconnect = append(tl.disconnect, window{startS: openDisconnect, endS: math.Inf(1)})
	}
	// Ramps that overlap in time may combine into settings that no step
	// reaches on its own: check the states between the steps as well.
	if len(errs) == 0 {
		for i := 0; i <= 64; i++ {
			t := float64(sc.DurationS) * float64(i) / 64
			p := tl.at(t)
			if err := p.validate(); err != nil {
				bad("at %.1f s the timeline reaches invalid settings: %w", t, err)
				break
			}
		}
	}
	if len(errs) > 0 {
		return nil, errors.Join(errs...)
	}
	return tl, nil
}

// stepChanges lists the setting changes of timeline step st (named key
// in messages), in section order and by setting name, each starting from
// the value in force in from. Unknown or non-finite settings go to bad.
func stepChanges(key string, st Step, from params, bad func(format string, args ...any)) []change {
	var changes []change
	for sec, m := range []map[string]float64{st.Patient, st.Ventilator, st.Sensor} {
		keys := []map[string]int{patientKeys, ventilatorKeys, sensorKeys}[sec]
		name := []string{"patient", "ventilator", "sensor"}[sec]
		names := make([]string, 0, len(m))
		for k := range m {
			names = append(names, k)
		}
		sort.Strings(names)
		for _, k := range names {
			f, ok := keys[k]
			if !ok {
				bad("%s.%s.%s: unknown setting (want one of %s)", key, name, k, sortedKeys(keys))
				continue
			}
			if math.IsNaN(m[k]) || math.IsInf(m[k], 0) {
				bad("%s.%s.%s: not a finite number", key, name, k)
				continue
			}
			start := from.field(sec, f)
			if math.IsNaN(start) { // an expiratory coefficient that followed the inspiratory one
				start = map[string]float64{"exp_resistance_cmh2o_s_per_l": from.Patient.ResistanceCmH2OSPerL,
					"exp_k2_cmh2o_s2_per_l2": from.Patient.K2CmH2OS2PerL2}[k]
			}
			changes = append(changes, change{section: sec, field: f, from: start, to: m[k]})
		}
	}
	return changes
}

// addEvent records the event of timeline step st (named key in
// messages), starting at at and lasting dur seconds: disconnect windows,
// closed by a later reconnect when dur is 0, and artifact windows.
// openDisconnect is the start of a disconnect still open, or negative;
// addEvent returns its new value. Bad events go to bad.
func (tl *timeline) addEvent(key string, st Step, at, dur, openDisconnect float64, bad func(format string, args ...any)) float64 {
	switch st.Event {
	case "":
	case EventDisconnect:
		if dur > 0 {
			tl.disconnect = append(tl.disconnect, window{startS: at, endS: at + dur})
		} else if openDisconnect < 0 {
			openDisconnect = at
		}
	case EventReconnect:
		if openDisconnect < 0 {
			bad("%s: reconnect without an open disconnect", key)
		} else {
			tl.disconnect = append(tl.disconnect, window{startS: openDisconnect, endS: at})
			openDisconnect = -1
		}
	case EventArtifact:
		if dur <= 0 {
			bad("%s: an artifact needs a duration", key)
		}
		w := window{startS: at, endS: at + dur, pressureCmH2O: st.ArtifactPressureCmH2O, flowLPM: st.ArtifactFlowLPM}
		if w.pressureCmH2O == 0 && w.flowLPM == 0 {
			w.pressureCmH2O, w.flowLPM = 8, 40
		}
		if w.pressureCmH2O < 0 || w.flowLPM < 0 {
			bad("%s: artifact pressure_cmh2o and flow_lpm must not be negative", key)
		}
		tl.artifacts = append(tl.artifacts, w)
	case EventExpiratoryHold:
		if !(dur > 0 && dur <= MaxExpiratoryHoldS) {
			bad("%s: an expiratory hold needs a duration in (0, %gs]", key, MaxExpiratoryHoldS)
		}
		tl.holds = append(tl.holds, window{startS: at, endS: at + dur})
	default:
		bad("%s.event: unknown event %q (want %s, %s, %s or %s)", key, st.Event, EventDisconnect, EventReconnect, EventArtifact, EventExpiratoryHold)
	}
	return openDisconnect
}

// at returns the settings in force at time t.
func (tl *timeline) at(t float64) params {
	p := tl.base
	for _, s := range tl.steps {
		if t < s.startS {
			break
		}
		frac := 1.0
		if s.endS > s.startS && t < s.endS {
			frac = (t - s.startS) / (s.endS - s.startS)
		}
		for _, c := range s.changes {
			p.setField(c.section, c.field, c.from+frac*(c.to-c.from))
		}
	}
	return p
}

// field reads a numeric field of a section by index.
func (p *params) field(section, i int) float64 {
	return p.section(section).Field(i).Float()
}

// setField writes a numeric field of a section by index.
func (p *params) setField(section, i int, v float64) {
	p.section(section).Field(i).SetFloat(v)
}

func (p *params) section(s int) reflect.Value {
	switch s {
	case 0:
		return reflect.ValueOf(&p.Patient).Elem()
	case 1:
		return reflect.ValueOf(&p.Ventilator).Elem()
	default:
		return reflect.ValueOf(&p.Sensor).Elem()
	}
}

// raisesPeak reports whether a set of changes raises the peak inspiratory
// pressure: more resistance, less compliance, more volume, flow, PEEP or
// inspiratory pressure. Under pressure control only PEEP and the
// inspiratory pressure set the peak.
func raisesPeak(cs []change, pc bool) bool {
	up := map[int]map[string]int{
		0: {"resistance_cmh2o_s_per_l": 1, "k2_cmh2o_s2_per_l2": 1, "resistance_2_cmh2o_s_per_l": 1,
			"airway_resistance_cmh2o_s_per_l": 1, "compliance_ml_per_cmh2o": -1, "compliance_2_ml_per_cmh2o": -1},
		1: {"tidal_volume_ml": 1, "flow_lpm": 1, "peep_cmh2o": 1, "insp_pressure_cmh2o": 1},
	}
	if pc {
		up = map[int]map[string]int{1: {"peep_cmh2o": 1, "insp_pressure_cmh2o": 1}}
	}
	for _, c := range cs {
		keys := []map[string]int{patientKeys, ventilatorKeys, sensorKeys}[c.section]
		for k, f := range keys {
			if f == c.field && up[c.section][k]*sign(c.to-c.from) > 0 {
				return true
			}
		}
	}
	return false
}

func sign(x float64) int {
	switch {
	case x > 0:
		return 1
	case x < 0:
		return -1
	}
	return 0
}
