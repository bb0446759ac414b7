package web

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"maps"
	"math"
	"runtime"
	"strings"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
)

// samples returns n samples at rateHz from t0 (pressure = t, flow = 1 L/s).
func samples(t0 float64, n int, rateHz float64) []ingest.Sample {
	ss := make([]ingest.Sample, n)
	for i := range ss {
		t := t0 + float64(i)/rateHz
		ss[i] = ingest.Sample{TimeS: t, PressureCmH2O: t, FlowLPS: 1, VolumeL: ingest.NoVolume}
	}
	return ss
}

// frameDoc is a frame as the page reads it.
type frameDoc struct {
	NowMS   int64          `json:"now_ms"`
	Full    bool           `json:"full"`
	Streams []summaryDoc   `json:"streams"`
	Detail  *detailDoc     `json:"detail"`
	Extra   map[string]any `json:"-"`
}

type summaryDoc struct {
	ID      string         `json:"id"`
	State   string         `json:"state"`
	Breaths int            `json:"breaths"`
	Last    map[string]any `json:"last"`
	Active  []alerts.Event `json:"active"`
}

type detailDoc struct {
	ID   string `json:"id"`
	Full bool   `json:"full"`
	Wave struct {
		TS      []float64 `json:"t_s"`
		P       []float64 `json:"p_cmh2o"`
		FlowLPM []float64 `json:"flow_lpm"`
	} `json:"wave"`
	Trend  map[string][]*float64 `json:"trend"`
	Events []alerts.Event        `json:"events"`
}

// parseSSE decodes one queued message ("data: {...}\n\n").
func parseSSE(t *testing.T, msg []byte) frameDoc {
	t.Helper()
	if !bytes.HasPrefix(msg, []byte("data: ")) || !bytes.HasSuffix(msg, []byte("\n\n")) {
		t.Fatalf("not one SSE data message: %.80q", msg)
	}
	body := msg[len("data: ") : len(msg)-2]
	if bytes.IndexByte(body, '\n') >= 0 {
		t.Fatalf("newline inside an SSE data line")
	}
	var f frameDoc
	if err := json.Unmarshal(body, &f); err != nil {
		t.Fatalf("frame is not JSON: %v\n%.300s", err, body)
	}
	return f
}

func recv(t *testing.T, c *client) frameDoc {
	t.Helper()
	select {
	case m := <-c.q:
		return parseSSE(t, m)
	default:
		t.Fatal("no frame queued")
	}
	return frameDoc{}
}

// TestDecimation checks the thinning against its arithmetic: 10 s at
// 1000 Hz thinned to 50 Hz keeps 10 × 50 points, one every 20 ms; the ring
// then holds at most WaveWindowS × DisplayRateHz points.
func TestDecimation(t *testing.T) {
	cases := []struct {
		name            string
		rateHz, seconds float64
		wantKept        uint64
		wantHeld        int
	}{
		{"1000 Hz for 10 s", 1000, 10, 500, 500},
		{"100 Hz for 10 s", 100, 10, 500, 500},
		{"25 Hz for 10 s (below the display rate: all kept)", 25, 10, 250, 250},
		{"100 Hz for 100 s (ring full)", 100, 100, 5000, 1500},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			h := NewHub(HubConfig{DisplayRateHz: 50, WaveWindowS: 30})
			n := int(tc.rateHz * tc.seconds)
			all := samples(0, n, tc.rateHz)
			for i := 0; i < n; i += 37 { // uneven batches
				h.Samples("s", all[i:min(i+37, n)])
			}
			if got := h.Stats().SamplesKept; got != tc.wantKept {
				t.Errorf("kept %d, want %d", got, tc.wantKept)
			}
			s := h.lookup("s")
			if len(s.wave.buf) != tc.wantHeld {
				t.Errorf("held %d, want %d", len(s.wave.buf), tc.wantHeld)
			}
			var prev float64 = -1
			s.wave.each(0, s.wave.total, func(p *wavePoint) {
				if prev >= 0 && p.tS-prev < 0.02-1e-9 {
					t.Fatalf("points %.4f and %.4f closer than the display period", prev, p.tS)
				}
				prev = p.tS
			})
		})
	}
}

// TestClockBack: a stream whose clock restarts starts its waveform afresh.
func TestClockBack(t *testing.T) {
	h := NewHub(HubConfig{})
	h.Samples("s", samples(100, 500, 100))
	h.Samples("s", samples(0, 100, 100))
	s := h.lookup("s")
	if len(s.wave.buf) != 50 || s.wave.at(s.wave.oldest()).tS != 0 {
		t.Errorf("after the clock went back: %d points from %.2f s, want 50 from 0", len(s.wave.buf), s.wave.at(s.wave.oldest()).tS)
	}
}

func event(stream, cond, id string, st alerts.State, supersedes string) alerts.Event {
	return alerts.Event{ID: id, Stream: stream, Condition: cond, Priority: alerts.Medium, State: st,
		Time: time.Unix(0, 0), Evidence: map[string]float64{"peepi_cmh2o": 5.5}, Message: "m " + id, Supersedes: supersedes}
}

// TestActiveAlarms follows alarms through the states of the alert event
// contract (docs/detectors.md): one current alarm per condition, in the
// order the conditions were first seen; a raise that supersedes replaces
// it, an acknowledgement keeps it, a clear of the current id ends it (a
// late clear of a superseded id does not).
func TestActiveAlarms(t *testing.T) {
	h := NewHub(HubConfig{})
	steps := []struct {
		ev   alerts.Event
		want []string // id:state of the current alarms
	}{
		{event("s", "air-trapping", "a1", alerts.Raised, ""), []string{"a1:raised"}},
		{event("s", "rising-peak", "b1", alerts.Raised, ""), []string{"a1:raised", "b1:raised"}},
		{event("s", "air-trapping", "a1", alerts.Escalated, ""), []string{"a1:escalated", "b1:raised"}},
		{event("s", "air-trapping", "a2", alerts.Raised, "a1"), []string{"a2:raised", "b1:raised"}},
		{event("s", "air-trapping", "a2", alerts.Acknowledged, ""), []string{"a2:acknowledged", "b1:raised"}},
		{event("s", "air-trapping", "a1", alerts.Cleared, ""), []string{"a2:acknowledged", "b1:raised"}},
		{event("s", "rising-peak", "b1", alerts.Cleared, ""), []string{"a2:acknowledged"}},
		{event("s", "air-trapping", "a2", alerts.Cleared, ""), nil},
	}
	for i, st := range steps {
		h.Alert(st.ev)
		s := h.lookup("s")
		var got []string
		for _, a := range s.active {
			got = append(got, a.ID+":"+string(a.State))
		}
		if strings.Join(got, ",") != strings.Join(st.want, ",") {
			t.Errorf("step %d: current alarms %v, want %v", i, got, st.want)
		}
	}
	if n := h.lookup("s").events.total; n != uint64(len(steps)) {
		t.Errorf("timeline holds %d events, want %d", n, len(steps))
	}
}

// TestSnapshotThenDeltas: a page's snapshot and the frames after it carry
// every displayed point exactly once, in order.
func TestSnapshotThenDeltas(t *testing.T) {
	h := NewHub(HubConfig{ClientQueue: 64})
	h.Samples("a", samples(0, 300, 100)) // 3 s → 150 points
	h.frame()
	c, err := h.register("")
	if err != nil {
		t.Fatal(err)
	}
	h.Samples("a", samples(3, 200, 100)) // 2 s → 100 points
	b := analyze.NewBreath()
	b.Stream, b.StartS, b.EndS, b.PEEPiCmH2O = "a", 1, 4, 3.5
	h.Breath(b)
	h.Alert(event("a", "air-trapping", "x1", alerts.Raised, ""))
	h.frame()
	h.frame()
	snap, d1, d2 := recv(t, c), recv(t, c), recv(t, c)
	if !snap.Full || snap.Detail == nil || snap.Detail.ID != "a" || !snap.Detail.Full {
		t.Fatalf("snapshot: full=%v detail=%+v", snap.Full, snap.Detail)
	}
	var ts []float64
	for _, f := range []frameDoc{snap, d1, d2} {
		if f.Detail != nil {
			ts = append(ts, f.Detail.Wave.TS...)
		}
	}
	if len(ts) != 250 {
		t.Errorf("%d points over snapshot and frames, want 250", len(ts))
	}
	for i := 1; i < len(ts); i++ {
		if ts[i] <= ts[i-1] {
			t.Fatalf("point %d at %.3f s after %.3f s", i, ts[i], ts[i-1])
		}
	}
	if len(d1.Detail.Events) != 1 || d1.Detail.Events[0].ID != "x1" {
		t.Errorf("first frame events %+v, want x1", d1.Detail.Events)
	}
	if p := d1.Detail.Trend["peepi_cmh2o"]; len(p) != 1 || p[0] == nil || *p[0] != 3.5 {
		t.Errorf("first frame trend %v, want one breath of 3.5 cmH2O", p)
	}
	if r := d1.Detail.Trend["pplat_cmh2o"]; len(r) != 1 || r[0] != nil {
		t.Errorf("a breath without plateau must send null, got %v", r)
	}
	if len(d1.Streams) != 1 || len(d1.Streams[0].Active) != 1 {
		t.Errorf("first frame summaries %+v, want stream a with one alarm", d1.Streams)
	}
	if len(d2.Streams) != 0 || len(d2.Detail.Wave.TS) != 0 {
		t.Errorf("a frame with nothing new carries %d summaries, %d points", len(d2.Streams), len(d2.Detail.Wave.TS))
	}
}

// TestSlowPageDropped: a page that reads nothing is dropped when its
// queue is full, and the feed never waits for it.
func TestSlowPageDropped(t *testing.T) {
	h := NewHub(HubConfig{ClientQueue: 3})
	c, err := h.register("a")
	if err != nil {
		t.Fatal(err)
	}
	fast, _ := h.register("a")
	for i := 0; i < 10; i++ {
		h.Samples("a", samples(float64(i), 100, 100))
		h.frame()
		for len(fast.q) > 0 { // this page keeps up
			<-fast.q
		}
	}
	select {
	case <-c.gone:
	default:
		t.Fatal("slow page still connected")
	}
	select {
	case <-fast.gone:
		t.Fatal("page that keeps up was dropped")
	default:
	}
	if st := h.Stats(); st.ClientsDropped != 1 || st.ClientsServed != 2 {
		t.Errorf("stats %+v, want 1 dropped of 2", st)
	}
}

// TestLimits: streams beyond MaxStreams and pages beyond MaxClients are
// refused and counted.
func TestLimits(t *testing.T) {
	h := NewHub(HubConfig{MaxStreams: 3, MaxClients: 2})
	for i := 0; i < 5; i++ {
		h.Samples(fmt.Sprint("s", i), samples(0, 10, 100))
	}
	if n := len(h.sorted()); n != 3 {
		t.Errorf("%d streams, want 3", n)
	}
	h.Alert(alerts.Event{ID: "x", Condition: "c"}) // no stream id
	if h.Stats().RefusedStreams != 3 {
		t.Errorf("refused %d feeds, want 3", h.Stats().RefusedStreams)
	}
	for i := 0; i < 3; i++ {
		_, err := h.register("")
		if (err != nil) != (i == 2) {
			t.Errorf("page %d: err %v", i, err)
		}
	}
}

// TestRunStops: Run returns when cancelled and disconnects the pages.
func TestRunStops(t *testing.T) {
	h := NewHub(HubConfig{Frame: 5 * time.Millisecond})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- h.Run(ctx) }()
	c, err := h.register("")
	if err != nil {
		t.Fatal(err)
	}
	time.Sleep(30 * time.Millisecond)
	cancel()
	select {
	case err := <-done:
		if err != nil {
			t.Errorf("Run: %v", err)
		}
	case <-time.After(5 * time.Second):
		t.Fatal("Run did not return within 5 s of cancellation")
	}
	select {
	case <-c.gone:
	default:
		t.Error("page still connected after Run returned")
	}
	if _, err := h.register(""); err == nil {
		t.Error("a page could connect to a stopped hub")
	}
	if h.Stats().Frames == 0 {
		t.Error("no frame was sent while running")
	}
}

// TestStreamState: waiting before any sample, live, silent after
// SilentAfter without samples, disconnected when the source says so.
func TestStreamState(t *testing.T) {
	now := time.Unix(1000, 0)
	h := NewHub(HubConfig{SilentAfter: 3 * time.Second, Now: func() time.Time { return now }})
	h.Status("s", ingest.StatusConnected)
	s := h.lookup("s")
	steps := []struct {
		do   func()
		want string
	}{
		{func() {}, "waiting"},
		{func() { h.Samples("s", samples(0, 10, 100)) }, "live"},
		{func() { now = now.Add(3 * time.Second) }, "live"},
		{func() { now = now.Add(time.Millisecond) }, "silent"},
		{func() { h.Samples("s", samples(1, 10, 100)) }, "live"},
		{func() { h.Status("s", ingest.StatusDisconnected) }, "disconnected"},
		{func() { h.Status("s", ingest.StatusConnected) }, "live"},
	}
	for i, st := range steps {
		st.do()
		s.mu.Lock()
		got := s.state(now, h.cfg.SilentAfter)
		s.mu.Unlock()
		if got != st.want {
			t.Errorf("step %d: state %q, want %q", i, got, st.want)
		}
	}
}

// TestMemoryBudget fills streams to every ring's capacity with the
// defaults and checks the heap they take against the budget stated in
// docs/live-view.md (300 kB a stream).
func TestMemoryBudget(t *testing.T) {
	const streams, budget = 20, 300 << 10
	var before, after runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&before)
	h := NewHub(HubConfig{})
	ev := map[string]float64{}
	for k := 0; k < 10; k++ {
		ev[fmt.Sprintf("evidence_key_%d", k)] = float64(k)
	}
	for i := 0; i < streams; i++ {
		id := fmt.Sprint("bed-", i)
		h.Samples(id, samples(0, 4000, 100)) // 40 s: more than the 30 s window
		for j := 0; j < 3700; j++ {
			b := analyze.NewBreath()
			b.Stream, b.StartS, b.EndS = id, float64(j), float64(j)+1
			h.Breath(b)
		}
		for j := 0; j < 250; j++ {
			e := event(id, "air-trapping", fmt.Sprintf("%s/air-trapping/%d", id, j), alerts.Raised, "")
			e.Evidence = maps.Clone(ev)
			e.Message = strings.Repeat("m", 120)
			h.Alert(e)
		}
	}
	runtime.GC()
	runtime.ReadMemStats(&after)
	per := (int64(after.HeapAlloc) - int64(before.HeapAlloc)) / streams
	t.Logf("heap per full stream: %d kB (budget %d kB)", per>>10, budget>>10)
	if per > budget {
		t.Errorf("a full stream takes %d kB, over the %d kB budget", per>>10, budget>>10)
	}
	runtime.KeepAlive(h)
}

// TestAppendNum: numbers are valid JSON that encoding/json (the reference)
// reads back, rounded to the stated decimals; unknown values are null.
func TestAppendNum(t *testing.T) {
	cases := []struct {
		v    float64
		prec int
		want string
	}{
		{math.NaN(), 2, "null"},
		{math.Inf(1), -1, "null"},
		{6.0999999046, 2, "6.1"},
		{-0.0001, 2, "0"},
		{12.3456, 3, "12.346"},
		{1e300, -1, "1e+300"},
		{0.1, -1, "0.1"},
	}
	for _, tc := range cases {
		got := string(appendNum(nil, tc.v, tc.prec))
		if got != tc.want {
			t.Errorf("appendNum(%v, %d) = %s, want %s", tc.v, tc.prec, got, tc.want)
		}
		if got != "null" {
			var back float64
			if err := json.Unmarshal([]byte(got), &back); err != nil {
				t.Errorf("%s is not a JSON number: %v", got, err)
			}
		}
	}
}
