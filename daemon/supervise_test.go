package daemon

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net/http"
	"os"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	dto "github.com/prometheus/client_model/go"
	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
)

// fakeSource delivers one batch of samples every period until cancelled, or
// fails after failAfter batches when failAfter > 0.
type fakeSource struct {
	period    time.Duration
	failAfter int
	sent      atomic.Uint64
}

var _ ingest.Source = (*fakeSource)(nil)

func (f *fakeSource) Run(ctx context.Context, sink ingest.Sink) error {
	sink(ingest.Event{Status: ingest.StatusConnected})
	t := time.NewTicker(f.period)
	defer t.Stop()
	n := 0
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-t.C:
		}
		if f.failAfter > 0 && n >= f.failAfter {
			return errors.New("device unplugged for good")
		}
		n++
		sink(ingest.Event{Samples: []ingest.Sample{{TimeS: float64(n)}}})
		f.sent.Add(1)
	}
}

func (f *fakeSource) Stats() ingest.Stats { return ingest.Stats{Samples: f.sent.Load()} }

// countingPipeline turns every batch into one breath, raises one alert with
// id "<stream>/test/1" on batch raiseAt (0: the first) and acknowledges it
// on request.
type countingPipeline struct {
	stream  string
	batches int
	flushed *atomic.Bool
	raiseAt int
}

var _ streamPipeline = (*countingPipeline)(nil)

func (p *countingPipeline) Samples(ss []ingest.Sample) stageOutput {
	p.batches++
	b := analyze.NewBreath()
	b.Seq = p.batches
	out := stageOutput{Breaths: []analyze.Breath{b}}
	if p.batches == max(p.raiseAt, 1) {
		out.Alerts = []alerts.Event{p.event(alerts.Raised)}
	}
	return out
}

func (p *countingPipeline) event(s alerts.State) alerts.Event {
	return alerts.Event{ID: p.stream + "/test/1", Stream: p.stream, Condition: "test", Class: "technical", Priority: alerts.Low, State: s}
}

func (p *countingPipeline) Status(ingest.Event, time.Time) stageOutput { return stageOutput{} }
func (p *countingPipeline) Tick(time.Time) stageOutput                 { return stageOutput{} }
func (p *countingPipeline) Ack(id, by string, _ time.Time) (stageOutput, error) {
	if id != p.stream+"/test/1" {
		return stageOutput{}, fmt.Errorf("no alarm %q", id)
	}
	return stageOutput{Alerts: []alerts.Event{p.event(alerts.Acknowledged)}}, nil
}
func (p *countingPipeline) Finding(analyze.Finding, time.Time) stageOutput { return stageOutput{} }

func (p *countingPipeline) Flush() stageOutput {
	if p.flushed != nil {
		p.flushed.Store(true)
	}
	return stageOutput{}
}

// memSink records alerts and breaths in memory.
type memSink struct {
	mu      sync.Mutex
	alerts  []alerts.Event
	breaths map[string]int
	status  map[string]int
}

func newMemSink() *memSink { return &memSink{breaths: map[string]int{}, status: map[string]int{}} }

func (m *memSink) Publish(_ context.Context, ev alerts.Event) error {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.alerts = append(m.alerts, ev)
	return nil
}

func (m *memSink) Breath(b *analyze.Breath) {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.breaths[b.Stream]++
}

func (m *memSink) Status(stream string, _ []byte) {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.status[stream]++
}

func (m *memSink) breathsOf(stream string) int {
	m.mu.Lock()
	defer m.mu.Unlock()
	return m.breaths[stream]
}

// waitFor polls cond every 10 ms for at most d.
func waitFor(t *testing.T, d time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(d)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting for %s", d, what)
		}
		time.Sleep(10 * time.Millisecond)
	}
}

func TestBackoffDoublesUpToMax(t *testing.T) {
	b := restartPolicy{Min: 100 * time.Millisecond, Max: time.Second}
	var got []time.Duration
	w := time.Duration(0)
	for range 6 {
		w = b.next(w)
		got = append(got, w)
	}
	want := []time.Duration{100, 200, 400, 800, 1000, 1000}
	for i := range want {
		if got[i] != want[i]*time.Millisecond {
			t.Fatalf("wait %d = %v, want %v (all: %v)", i, got[i], want[i]*time.Millisecond, got)
		}
	}
}

func TestFailingStreamRestartsWithoutDisturbingOthers(t *testing.T) {
	m := newMetrics()
	sink := newMemSink()
	log := zerolog.Nop()
	quick := restartPolicy{Min: 20 * time.Millisecond, Max: 80 * time.Millisecond, StableAfter: time.Minute}
	var opens atomic.Int32
	var flushed atomic.Bool
	good := newStream(streamSpec{
		ID: "bed-1",
		Open: func() (ingest.Source, streamPipeline, error) {
			return &fakeSource{period: 5 * time.Millisecond}, &countingPipeline{stream: "bed-1", flushed: &flushed}, nil
		},
		Backoff: quick,
	}, log, m, sink, sink)
	bad := newStream(streamSpec{
		ID: "bed-2",
		Open: func() (ingest.Source, streamPipeline, error) {
			opens.Add(1)
			return &fakeSource{period: 5 * time.Millisecond, failAfter: 2}, &countingPipeline{stream: "bed-2"}, nil
		},
		Backoff: quick,
	}, log, m, sink, sink)
	panicky := newStream(streamSpec{
		ID: "bed-3",
		Open: func() (ingest.Source, streamPipeline, error) {
			return &fakeSource{period: 5 * time.Millisecond}, panicPipeline{}, nil
		},
		Backoff: quick,
	}, log, m, sink, sink)

	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan error, 3)
	for _, s := range []*stream{good, bad, panicky} {
		go func() { done <- s.Run(ctx) }()
	}
	waitFor(t, 5*time.Second, "bed-2 to be restarted 3 times", func() bool { return opens.Load() >= 4 })
	waitFor(t, 5*time.Second, "bed-3 to be restarted after panics", func() bool { return panicky.restarts.Load() >= 2 })
	before := sink.breathsOf("bed-1")
	waitFor(t, 5*time.Second, "bed-1 to keep producing breaths", func() bool { return sink.breathsOf("bed-1") > before+10 })
	if good.restarts.Load() != 0 {
		t.Errorf("bed-1 restarted %d times because of its neighbours", good.restarts.Load())
	}
	if err := good.ready(); err != nil {
		t.Errorf("bed-1 not ready: %v", err)
	}

	// The acknowledgement reaches the pipeline and its event is published.
	if err := good.ack(ctx, "bed-1/test/1", "nurse"); err != nil {
		t.Fatalf("ack: %v", err)
	}
	if err := good.ack(ctx, "bed-1/nothing/9", "nurse"); err == nil {
		t.Error("ack of an unknown alarm succeeded")
	}

	cancel()
	for range 3 {
		select {
		case err := <-done:
			if err != nil {
				t.Errorf("Run returned %v after cancellation", err)
			}
		case <-time.After(5 * time.Second):
			t.Fatal("a stream did not stop within 5 s of cancellation")
		}
	}
	if !flushed.Load() {
		t.Error("bed-1's pipeline was not flushed at shutdown")
	}
	sink.mu.Lock()
	defer sink.mu.Unlock()
	var acked bool
	for _, ev := range sink.alerts {
		if ev.ID == "bed-1/test/1" && ev.State == alerts.Acknowledged {
			acked = true
		}
	}
	if !acked {
		t.Errorf("no acknowledged event published; got %+v", sink.alerts)
	}
}

// panicPipeline panics on every batch: a bug in one stream's analysis.
type panicPipeline struct{}

func (panicPipeline) Samples([]ingest.Sample) stageOutput                { panic("index out of range") }
func (panicPipeline) Status(ingest.Event, time.Time) stageOutput         { return stageOutput{} }
func (panicPipeline) Tick(time.Time) stageOutput                         { return stageOutput{} }
func (panicPipeline) Ack(string, string, time.Time) (stageOutput, error) { return stageOutput{}, nil }
func (panicPipeline) Flush() stageOutput                                 { return stageOutput{} }
func (panicPipeline) Finding(analyze.Finding, time.Time) stageOutput     { return stageOutput{} }

func TestHTTPHealthReadyMetrics(t *testing.T) {
	m := newMetrics()
	ready := newReadiness()
	var natsUp atomic.Bool
	ready.set("nats", func() error {
		if !natsUp.Load() {
			return errors.New("not connected")
		}
		return nil
	})
	m.addSource("bed-1", func() ingest.Stats { return ingest.Stats{Samples: 1234, BadLines: 3} })
	m.breaths.WithLabelValues("bed-1").Add(7)
	m.setDelivery(func() int { return 2 }, natsUp.Load, func() uint64 { return 0 })
	h, err := newHTTPServer("127.0.0.1:0", false, m, ready, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan error, 1)
	go func() { done <- h.Run(ctx) }()
	get := func(path string) (int, string) {
		t.Helper()
		c := http.Client{Timeout: 5 * time.Second}
		resp, err := c.Get("http://" + h.Addr() + path)
		if err != nil {
			t.Fatalf("GET %s: %v", path, err)
		}
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		return resp.StatusCode, string(b)
	}
	if code, _ := get("/healthz"); code != 200 {
		t.Errorf("/healthz = %d, want 200", code)
	}
	if code, body := get("/readyz"); code != 503 || !strings.Contains(body, "nats: not connected") {
		t.Errorf("/readyz before NATS = %d %q, want 503 naming nats", code, body)
	}
	natsUp.Store(true)
	if code, body := get("/readyz"); code != 200 {
		t.Errorf("/readyz = %d %q, want 200", code, body)
	}
	_, body := get("/metrics")
	for _, want := range []string{
		`trapline_samples_total{stream="bed-1"} 1234`,
		`trapline_decoder_errors_total{kind="line",stream="bed-1"} 3`,
		`trapline_breaths_total{stream="bed-1"} 7`,
		`trapline_spool_depth 2`,
		`trapline_nats_connected 1`,
		`go_goroutines`,
	} {
		if !strings.Contains(body, want) {
			t.Errorf("/metrics lacks %q", want)
		}
	}

	// A second server on the same port fails with a clear message.
	_, err = newHTTPServer(h.Addr(), false, m, ready, zerolog.Nop())
	if !errors.Is(err, ErrPortInUse) || !strings.Contains(err.Error(), "http.listen") {
		t.Errorf("second listener: %v, want ErrPortInUse naming http.listen", err)
	}
	cancel()
	select {
	case <-done:
	case <-time.After(5 * time.Second):
		t.Fatal("http server did not stop")
	}
}

// sampleCounter counts the samples its stream analyses.
type sampleCounter struct {
	countingPipeline
	n *atomic.Int64
}

func (p *sampleCounter) Samples(ss []ingest.Sample) stageOutput {
	p.n.Add(int64(len(ss)))
	return p.countingPipeline.Samples(ss)
}

// TestFiniteSourceFinishesItsStream reads a recording through a real file
// source: at its end the stream is finished, not restarted, so every sample
// is analysed exactly once and the stream stays ready.
func TestFiniteSourceFinishesItsStream(t *testing.T) {
	const n = 500
	path := flatRecording(t, "bed-7", n)
	var analysed atomic.Int64
	sink := newMemSink()
	s := newStream(streamSpec{
		ID:     "bed-7",
		Finite: true,
		Open: func() (ingest.Source, streamPipeline, error) {
			src, err := ingest.Open("file://"+path+"?pace=max", ingest.Options{Stream: "bed-7"})
			return src, &sampleCounter{countingPipeline{stream: "bed-7"}, &analysed}, err
		},
		Backoff: restartPolicy{Min: 10 * time.Millisecond, Max: 20 * time.Millisecond, StableAfter: time.Minute},
	}, zerolog.Nop(), newMetrics(), sink, sink)

	runToEnd(t, s)
	if got := analysed.Load(); got != n {
		t.Errorf("analysed %d samples, want each of the %d exactly once", got, n)
	}
	if r := s.restarts.Load(); r != 0 {
		t.Errorf("restarted %d times after the end of the recording", r)
	}
	if err := s.ready(); err != nil {
		t.Errorf("a finished stream is not ready: %v", err)
	}
}

// slowCounter is a sampleCounter whose analysis takes a while per batch.
type slowCounter struct{ sampleCounter }

func (p *slowCounter) Samples(ss []ingest.Sample) stageOutput {
	time.Sleep(2 * time.Millisecond)
	return p.sampleCounter.Samples(ss)
}

// TestBlockingSourceDropsNothing reads a recording through a file source
// into an analysis slower than the file and a queue of one batch: behind a
// source that promises to drop nothing, the stream waits for the analysis
// and every sample is analysed.
func TestBlockingSourceDropsNothing(t *testing.T) {
	const n = 3000
	path := flatRecording(t, "bed-8", n)
	var analysed atomic.Int64
	sink := newMemSink()
	s := newStream(streamSpec{
		ID: "bed-8", Finite: true, QueueLen: 1, Overload: ingest.OverloadDefault.For("file"),
		Open: func() (ingest.Source, streamPipeline, error) {
			src, err := ingest.Open("file://"+path+"?pace=max", ingest.Options{Stream: "bed-8", Buffer: 1})
			return src, &slowCounter{sampleCounter{countingPipeline{stream: "bed-8"}, &analysed}}, err
		},
		Backoff: restartPolicy{Min: 10 * time.Millisecond, Max: 20 * time.Millisecond, StableAfter: time.Minute},
	}, zerolog.Nop(), newMetrics(), sink, sink)
	runToEnd(t, s)
	if got := analysed.Load(); got != n {
		t.Errorf("analysed %d samples, want all %d", got, n)
	}
}

// flatRecording writes n samples of a flat signal at 100 Hz, in the sample
// line format v1, to a file and returns its path.
func flatRecording(t *testing.T, stream string, n int) string {
	t.Helper()
	path := t.TempDir() + "/" + stream + ".csv"
	var b strings.Builder
	b.WriteString("time[s],pressure[cmH2O],flow[L/min]\n")
	for i := range n {
		fmt.Fprintf(&b, "%.2f,5.0,0.0\n", float64(i)/100)
	}
	if err := os.WriteFile(path, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	return path
}

// runToEnd runs the stream of a finite source until it finishes by itself
// (at most 30 s) and fails the test on an error.
func runToEnd(t *testing.T, s *stream) {
	t.Helper()
	done := make(chan error, 1)
	go func() { done <- s.Run(t.Context()) }()
	select {
	case err := <-done:
		if err != nil {
			t.Fatalf("Run: %v", err)
		}
	case <-time.After(30 * time.Second):
		t.Fatal("the stream of a finished recording did not end within 30 s")
	}
}

// TestForeignStreamSamplesRefused: a recording of bed-7 that also carries
// rows of bed-8 in its stream column: only bed-7's samples are analysed,
// bed-8's are refused and counted.
func TestForeignStreamSamplesRefused(t *testing.T) {
	enc, err := ingest.NewTextEncoder(ingest.TextEncoderOptions{Decimals: 3})
	if err != nil {
		t.Fatal(err)
	}
	enc = enc.WithStream()
	data := enc.Header()
	const n = 300
	for i := range n {
		s := ingest.Sample{TimeS: float64(i) / 100, PressureCmH2O: 5}
		data = enc.Append(data, "bed-7", s)
		data = enc.Append(data, "bed-8", s)
	}
	path := t.TempDir() + "/mixed.txt"
	if err := os.WriteFile(path, data, 0o644); err != nil {
		t.Fatal(err)
	}
	var analysed atomic.Int64
	sink := newMemSink()
	m := newMetrics()
	s := newStream(streamSpec{
		ID: "bed-7", Finite: true,
		Open: func() (ingest.Source, streamPipeline, error) {
			src, err := ingest.Open("file://"+path+"?pace=max", ingest.Options{Stream: "bed-7"})
			return src, &sampleCounter{countingPipeline{stream: "bed-7"}, &analysed}, err
		},
		Backoff: restartPolicy{Min: 10 * time.Millisecond, Max: 20 * time.Millisecond, StableAfter: time.Minute},
	}, zerolog.Nop(), m, sink, sink)
	runToEnd(t, s)
	if got := analysed.Load(); got != n {
		t.Errorf("analysed %d samples, want bed-7's %d only", got, n)
	}
	var pb dto.Metric
	if err := m.foreignStream.WithLabelValues("bed-7").Write(&pb); err != nil {
		t.Fatal(err)
	}
	if got := pb.GetCounter().GetValue(); got != n {
		t.Errorf("refused %v samples of bed-8, want %d", got, n)
	}
}
