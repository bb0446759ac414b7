package web

import (
	"context"
	"fmt"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
	"trapline/simulator"
)

// feeder runs one simulated stream through the breath analyzer and the
// alarm judge, as `trapline analyze` does offline (alerts.OfflineClock, a
// tick a second of stream time), paced against the wall clock at speed
// times real time, and feeds the hub as the daemon does. It also serves
// acknowledgements for its stream from the same goroutine, because the
// alarm lifecycle belongs to it: this is the small real Acker of the tests.
type feeder struct {
	hub    sink
	stream string
	sim    *simulator.Sim
	an     *analyze.Analyzer
	judge  *alerts.Judge
	clock  alerts.OfflineClock
	speed  float64

	acks chan ackCall
	// calls records every acknowledgement asked for.
	mu    sync.Mutex
	calls []ackCall

	breaths atomic.Int64 // breaths fed so far
	// firstRaise is called once per condition with its first raise and
	// the breath count when the hub got it.
	onAlert func(ev alerts.Event, breaths int64)
}

// sink is what a feeder feeds: the hub, or a recording.
type sink interface {
	Samples(stream string, ss []ingest.Sample)
	Breath(b analyze.Breath)
	Alert(ev alerts.Event)
}

// recording is a stream's samples, breaths and alert events, in order.
type recording struct {
	samples []ingest.Sample
	breaths []analyze.Breath
	events  []alerts.Event
}

func (r *recording) Samples(_ string, ss []ingest.Sample) { r.samples = append(r.samples, ss...) }
func (r *recording) Breath(b analyze.Breath)              { r.breaths = append(r.breaths, b) }
func (r *recording) Alert(ev alerts.Event)                { r.events = append(r.events, ev) }

// record runs a scenario for seconds of stream time, as fast as it goes.
func record(t testing.TB, scenario string, seconds float64) *recording {
	t.Helper()
	rec := &recording{}
	f := newFeeder(t, rec, scenario, 1)
	buf := make([]ingest.Sample, 100)
	for !f.sim.Done() {
		n := f.sim.Read(buf)
		if n == 0 || buf[0].TimeS > seconds {
			break
		}
		rec.Samples(f.stream, buf[:n])
		f.push(buf[:n])
	}
	return rec
}

// ackCall is one acknowledgement request and where its answer goes.
type ackCall struct {
	Stream, ID, By, Note string
	reply                chan ackAnswer
}

type ackAnswer struct {
	res AckResult
	err error
}

func newFeeder(t testing.TB, hub sink, scenario string, speed float64) *feeder {
	t.Helper()
	sc, err := simulator.Shipped(scenario)
	if err != nil {
		t.Fatalf("scenario %s: %v", scenario, err)
	}
	sim, err := simulator.New(sc)
	if err != nil {
		t.Fatalf("simulator %s: %v", scenario, err)
	}
	stream := sim.Stream()
	return &feeder{
		hub: hub, stream: stream, sim: sim, speed: speed,
		an:    analyze.NewAnalyzer(stream, analyze.DefaultConfig()),
		judge: alerts.NewJudge(stream, analyze.DefaultDetectorConfig(), alerts.DefaultLifecycleConfig()),
		clock: alerts.OfflineClock{Epoch: time.Now()},
		acks:  make(chan ackCall, 4),
	}
}

// Ack implements Acker for the feeder's stream: the request goes to the
// feeder's goroutine, which owns the lifecycle.
func (f *feeder) Ack(ctx context.Context, stream, id, by, note string) (AckResult, error) {
	if stream != f.stream {
		return AckResult{}, fmt.Errorf("no stream %q here", stream)
	}
	c := ackCall{Stream: stream, ID: id, By: by, Note: note, reply: make(chan ackAnswer, 1)}
	f.mu.Lock()
	f.calls = append(f.calls, c)
	f.mu.Unlock()
	select {
	case f.acks <- c:
	case <-ctx.Done():
		return AckResult{}, ctx.Err()
	}
	select {
	case a := <-c.reply:
		return a.res, a.err
	case <-ctx.Done():
		return AckResult{}, ctx.Err()
	}
}

func (f *feeder) ackCalls() []ackCall {
	f.mu.Lock()
	defer f.mu.Unlock()
	return append([]ackCall(nil), f.calls...)
}

func (f *feeder) emit(ev *alerts.Event) {
	f.hub.Alert(*ev)
	if f.onAlert != nil {
		f.onAlert(*ev, f.breaths.Load())
	}
}

// run feeds the stream until ctx is cancelled or the scenario ends.
func (f *feeder) run(ctx context.Context) {
	const batch = 5 // samples per batch: 50 ms at 100 Hz
	buf := make([]ingest.Sample, batch)
	start := time.Now()
	tick := time.NewTicker(10 * time.Millisecond)
	defer tick.Stop()
	for !f.sim.Done() {
		n := f.sim.Read(buf)
		if n == 0 {
			return
		}
		ss := buf[:n]
		due := start.Add(time.Duration(ss[n-1].TimeS / f.speed * float64(time.Second)))
		for time.Now().Before(due) {
			select {
			case <-ctx.Done():
				return
			case c := <-f.acks:
				f.ack(c, ss[0].TimeS)
			case <-tick.C:
			}
		}
		f.hub.Samples(f.stream, ss)
		f.push(ss)
	}
}

// push analyses a batch as the daemon's pipeline does: technical
// detectors on every sample, breath detectors on every breath.
func (f *feeder) push(ss []ingest.Sample) {
	for i := range ss {
		tS := ss[i].TimeS
		f.clock.Until(tS, func(tickS float64) { f.judge.Tick(tickS, f.clock.Wall(tickS), f.emit) })
		f.judge.Samples(ss[i:i+1], tS, f.clock.Wall(tS), f.emit)
		b, ok := f.an.Push(ss[i])
		if !ok {
			continue
		}
		b.Stream = f.stream
		f.hub.Breath(b)
		f.breaths.Add(1)
		f.judge.Breath(&b, f.clock.Wall(tS), f.emit)
	}
}

func (f *feeder) ack(c ackCall, tS float64) {
	evs, err := f.judge.Lifecycle().AckBy(c.ID, c.By, f.clock.Wall(tS))
	for i := range evs {
		f.emit(&evs[i])
	}
	c.reply <- ackAnswer{AckResult{Events: evs}, err}
}
