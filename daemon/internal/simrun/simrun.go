// Package simrun runs a shipped simulator scenario through the breath
// analyzer and the alarm judge offline, on the offline clock that
// `trapline analyze` uses, and returns what came out. It feeds the tests of
// the figure and terminal packages with realistic data; it is not a second
// pipeline for production use (the daemon's own pipeline is that).
package simrun

import (
	"fmt"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
	"trapline/simulator"
)

// Epoch is the wall time of stream time 0, so that alert ids and times are
// a deterministic function of the scenario.
var Epoch = time.Date(2026, 1, 1, 8, 0, 0, 0, time.UTC)

// Result is one analysed scenario.
type Result struct {
	Stream  string
	Samples []ingest.Sample
	Breaths []analyze.Breath
	Alerts  []alerts.Event
}

// Run simulates the shipped scenario name, cut to at most maxS seconds of
// stream time when maxS > 0, and analyses it with the default
// configuration.
func Run(name string, maxS float64) (*Result, error) {
	sc, err := simulator.Shipped(name)
	if err != nil {
		return nil, fmt.Errorf("scenario %s: %w", name, err)
	}
	if maxS > 0 && float64(sc.DurationS) > maxS {
		sc.DurationS = simulator.Seconds(maxS)
	}
	samples, _, err := simulator.Run(sc)
	if err != nil {
		return nil, fmt.Errorf("simulate %s: %w", name, err)
	}
	stream := sc.Stream
	if stream == "" {
		stream = "sim"
	}
	r := &Result{Stream: stream, Samples: samples}
	an := analyze.NewAnalyzer(stream, analyze.DefaultConfig())
	judge := alerts.NewJudge(stream, analyze.DefaultDetectorConfig(), alerts.DefaultLifecycleConfig())
	clock := alerts.OfflineClock{Epoch: Epoch}
	emit := func(ev *alerts.Event) { r.Alerts = append(r.Alerts, *ev) }
	for i := range samples {
		t := samples[i].TimeS
		clock.Until(t, func(tickS float64) { judge.Tick(tickS, clock.Wall(tickS), emit) })
		judge.Samples(samples[i:i+1], t, clock.Wall(t), emit)
		b, ok := an.Push(samples[i])
		if !ok {
			continue
		}
		b.Stream = stream
		r.Breaths = append(r.Breaths, b)
		judge.Breath(&r.Breaths[len(r.Breaths)-1], clock.Wall(t), emit)
	}
	return r, nil
}
