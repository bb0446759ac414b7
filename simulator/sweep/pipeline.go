package sweep

import (
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
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

// tickS is how often the time-based technical conditions are evaluated,
// on the sample clock: once a second, the daemon's default tick period.
const tickS = 1.0

// wallEpoch anchors the synthetic wall clock of the lifecycle: stream time
// after it, so that alert ids are a deterministic function of the run.
var wallEpoch = time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)

// stage is the per-stream glue of one detector set: the detectors of
// package analyze feeding the alarm lifecycle of package alerts, wired as
// the daemon's offline pipeline wires them (daemon/pipeline.go, which the
// simulator may not import): every sample goes to the technical detector
// at its own time, every breath to the breath detectors, a tick once a
// second of stream time (through gaps too), and the wall time of anything
// at stream time t is a fixed epoch plus t. It collects the alert events.
type stage struct {
	det      *analyze.Detectors
	life     *alerts.Lifecycle
	findings []analyze.Finding
	events   []AlertEvent
}

func newStage(stream string, set *DetectorSet) *stage {
	return &stage{
		det:      analyze.NewDetectors(set.Detectors),
		life:     alerts.NewLifecycle(stream, set.Alarms),
		findings: make([]analyze.Finding, 0, 16),
	}
}

// update passes the collected findings to the lifecycle at stream time tS.
func (s *stage) update(tS float64) {
	wall := wallEpoch.Add(time.Duration(tS * float64(time.Second)))
	for i := range s.findings {
		for _, ev := range s.life.Update(s.findings[i], wall) {
			s.events = append(s.events, AlertEvent{Condition: ev.Condition, State: string(ev.State), TS: ev.TS,
				Fresh: ev.State == alerts.Raised && ev.Supersedes == ""})
		}
	}
	s.findings = s.findings[:0]
}

// sample passes one sample (a one-element slice of the caller's buffer).
func (s *stage) sample(one []ingest.Sample) {
	s.findings = s.det.Samples(one, one[0].TimeS, s.findings)
	s.update(one[0].TimeS)
}

func (s *stage) breath(b *analyze.Breath, tS float64) {
	s.findings = s.det.Breath(b, s.findings)
	s.update(tS)
}

func (s *stage) tick(nowS float64) {
	s.findings = s.det.Tick(nowS, s.findings)
	s.update(nowS)
}

func (s *stage) status(st ingest.Status, nowS float64) {
	s.det.Status(&ingest.Event{Status: st}, nowS)
}
