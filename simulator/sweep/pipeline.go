package sweep

import (
	"time"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/analyze"
)

// DetectorSet is one configuration of the detectors and of the alarm
// lifecycle: the `detectors:` and `alarms:` sections of a config file.
type DetectorSet struct {
	// Name labels the set in the report ("default", a file name).
	Name      string
	Detectors analyze.DetectorConfig
	Alarms    alerts.LifecycleConfig
}

// DefaultDetectorSet returns the shipped defaults.
func DefaultDetectorSet() DetectorSet {
	return DetectorSet{Name: "default", Detectors: analyze.DefaultDetectorConfig(), Alarms: alerts.DefaultLifecycleConfig()}
}

// Validate reports every invalid value of the set.
func (s *DetectorSet) Validate() []error {
	errs := s.Detectors.Validate("detectors")
	return append(errs, s.Alarms.Validate("alarms")...)
}

// wallEpoch anchors the synthetic wall clock of the lifecycle: stream time
// after it, so that alert ids are a deterministic function of the run.
var wallEpoch = time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)

// stage judges one stream for one detector set with the per-stream
// pipeline the daemon and `trapline analyze` use (alerts/pipeline), on its
// offline clock: every sample goes to the technical detectors at its own
// time, every breath to the breath detectors, a tick once a second of
// stream time (through gaps too). It is the pipeline's sink and collects
// the alert events; onBreath, when set, sees every breath. The analysis is
// deterministic, so the stages of a case judge the very same breaths.
type stage struct {
	pl       *pipeline.Pipeline
	events   []AlertEvent
	onBreath func(*analyze.Breath)
}

func newStage(stream string, acfg analyze.Config, set *DetectorSet) *stage {
	return &stage{pl: pipeline.NewOffline(pipeline.Options{Stream: stream, Analysis: acfg,
		Detectors: set.Detectors, Alarms: set.Alarms}, wallEpoch)}
}

// Breath passes a breath to onBreath.
func (s *stage) Breath(b *analyze.Breath) {
	if s.onBreath != nil {
		s.onBreath(b)
	}
}

// Alert collects an alert event.
func (s *stage) Alert(ev *alerts.Event) {
	s.events = append(s.events, AlertEvent{Condition: ev.Condition, State: string(ev.State), TS: ev.TS,
		Fresh: ev.State == alerts.Raised && ev.Supersedes == ""})
}
