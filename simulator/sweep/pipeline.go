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

// wallEpoch anchors the synthetic wall clock of the lifecycle: stream time
// after it, so that alert ids are a deterministic function of the run.
var wallEpoch = time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)

// stage judges one stream for one detector set with the judge the daemon
// uses (alerts.Judge), on the offline clock that `trapline analyze` uses
// (alerts.OfflineClock): every sample goes to the technical detectors at
// its own time, every breath to the breath detectors, a tick once a second
// of stream time (through gaps too). It collects the alert events. The
// analyzer is shared by all the stages of a case, so a comparison of two
// detector sets judges the very same breaths.
type stage struct {
	judge  *alerts.Judge
	clock  alerts.OfflineClock
	events []AlertEvent
	emit   func(*alerts.Event)
}

func newStage(stream string, set *DetectorSet) *stage {
	s := &stage{judge: alerts.NewJudge(stream, set.Detectors, set.Alarms), clock: alerts.OfflineClock{Epoch: wallEpoch}}
	s.emit = func(ev *alerts.Event) {
		s.events = append(s.events, AlertEvent{Condition: ev.Condition, State: string(ev.State), TS: ev.TS,
			Fresh: ev.State == alerts.Raised && ev.Supersedes == ""})
	}
	return s
}

// advance makes the ticks due up to stream time tS.
func (s *stage) advance(tS float64) {
	s.clock.Until(tS, func(tickS float64) { s.judge.Tick(tickS, s.clock.Wall(tickS), s.emit) })
}

// sample passes one sample (a one-element slice of the caller's buffer).
func (s *stage) sample(one []ingest.Sample) {
	t := one[0].TimeS
	s.advance(t)
	s.judge.Samples(one, t, s.clock.Wall(t), s.emit)
}

func (s *stage) breath(b *analyze.Breath, tS float64) {
	s.judge.Breath(b, s.clock.Wall(tS), s.emit)
}

// finish makes the ticks due up to the end of the run at stream time tS.
func (s *stage) finish(tS float64) { s.advance(tS) }

func (s *stage) status(st ingest.Status, nowS float64) {
	s.judge.Status(&ingest.Event{Status: st}, nowS)
}
