package web

import (
	"bufio"
	"context"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"
	"unicode/utf8"

	"trapline/alerts"
)

// recordingAcker acknowledges by recording the call and feeding the
// acknowledged event to the hub, as the daemon's service does through its
// pipeline.
type recordingAcker struct {
	hub   *Hub
	mu    sync.Mutex
	calls []ackCall
	fail  error
}

func (a *recordingAcker) Ack(_ context.Context, stream, id, by, note string) (AckResult, error) {
	a.mu.Lock()
	a.calls = append(a.calls, ackCall{Stream: stream, ID: id, By: by, Note: note})
	a.mu.Unlock()
	if a.fail != nil {
		return AckResult{}, a.fail
	}
	ev := event(stream, "air-trapping", id, alerts.Acknowledged, "")
	a.hub.Alert(ev)
	return AckResult{Events: []alerts.Event{ev}}, nil
}

func newTestServer(t *testing.T, acker Acker) (*Hub, *httptest.Server) {
	t.Helper()
	hub := NewHub(HubConfig{Frame: 20 * time.Millisecond})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { defer close(done); _ = hub.Run(ctx) }()
	mux := http.NewServeMux()
	Mount(mux, NewHandler(hub, acker))
	srv := httptest.NewServer(mux)
	t.Cleanup(func() {
		cancel()
		<-done
		srv.Close()
	})
	return hub, srv
}

// TestAckEndpoint checks the checks of POST /live/ack table by table.
func TestAckEndpoint(t *testing.T) {
	acker := &recordingAcker{}
	hub, srv := newTestServer(t, acker)
	acker.hub = hub
	hub.Samples("icu-1", samples(0, 10, 100))
	good := `{"stream":"icu-1","id":"icu-1/air-trapping/1","by":"A. Tester","note":"seen"}`
	cases := []struct {
		name, method, ctype, origin, body string
		want                              int
	}{
		{"ok", "POST", "application/json", "", good, 200},
		{"same origin", "POST", "application/json; charset=utf-8", srv.URL, good, 200},
		{"other origin", "POST", "application/json", "http://example.invalid", good, 403},
		{"GET", "GET", "", "", "", 405},
		{"form post", "POST", "application/x-www-form-urlencoded", "", good, 415},
		{"not JSON", "POST", "application/json", "", `{"stream":`, 400},
		{"unknown field", "POST", "application/json", "", `{"stream":"icu-1","id":"x","as":"root"}`, 400},
		{"no id", "POST", "application/json", "", `{"stream":"icu-1"}`, 400},
		{"long by", "POST", "application/json", "", `{"stream":"icu-1","id":"x","by":"` + strings.Repeat("b", 65) + `"}`, 400},
		{"huge body", "POST", "application/json", "", `{"stream":"icu-1","id":"` + strings.Repeat("x", 5000) + `"}`, 400},
		{"unknown stream", "POST", "application/json", "", `{"stream":"nope","id":"x"}`, 404},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			req, _ := http.NewRequest(tc.method, srv.URL+"/live/ack", strings.NewReader(tc.body))
			if tc.ctype != "" {
				req.Header.Set("Content-Type", tc.ctype)
			}
			if tc.origin != "" {
				req.Header.Set("Origin", tc.origin)
			}
			resp, err := http.DefaultClient.Do(req)
			if err != nil {
				t.Fatal(err)
			}
			defer resp.Body.Close()
			var rep ackReply
			if err := json.NewDecoder(resp.Body).Decode(&rep); err != nil {
				t.Fatalf("reply is not JSON: %v", err)
			}
			if resp.StatusCode != tc.want || rep.OK != (tc.want == 200) {
				t.Errorf("status %d ok=%v (%s), want %d", resp.StatusCode, rep.OK, rep.Error, tc.want)
			}
		})
	}
	acker.mu.Lock()
	defer acker.mu.Unlock()
	if len(acker.calls) != 2 || acker.calls[0].By != "A. Tester" || acker.calls[0].Note != "seen" || acker.calls[0].ID != "icu-1/air-trapping/1" {
		t.Errorf("acker calls %+v, want the two good requests", acker.calls)
	}
}

// TestAckRefusedByService: the service's refusal reaches the page.
func TestAckRefusedByService(t *testing.T) {
	acker := &recordingAcker{fail: alerts.ErrUnknownAlert}
	hub, srv := newTestServer(t, acker)
	acker.hub = hub
	hub.Samples("s", samples(0, 10, 100))
	resp, err := http.Post(srv.URL+"/live/ack", "application/json", strings.NewReader(`{"stream":"s","id":"gone"}`))
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	var rep ackReply
	_ = json.NewDecoder(resp.Body).Decode(&rep)
	if resp.StatusCode != http.StatusConflict || !strings.Contains(rep.Error, alerts.ErrUnknownAlert.Error()) {
		t.Errorf("status %d error %q, want 409 naming the unknown id", resp.StatusCode, rep.Error)
	}
}

// TestPageAndAssets: the page, the script and the vendored library come
// from the binary, with a policy that allows no other origin.
func TestPageAndAssets(t *testing.T) {
	_, srv := newTestServer(t, nil)
	for _, tc := range []struct{ path, ctype, holds string }{
		{"/live/", "text/html", `data-ack="off"`},
		{"/live/assets/live.js", "javascript", "textContent"},
		{"/live/assets/vendor/uplot/uPlot.iife.min.js", "javascript", "uPlot"},
		{"/live/assets/vendor/uplot/LICENSE", "text/plain", "MIT"},
	} {
		resp, err := http.Get(srv.URL + tc.path)
		if err != nil {
			t.Fatal(err)
		}
		b, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		if resp.StatusCode != 200 || !strings.Contains(resp.Header.Get("Content-Type"), tc.ctype) || !strings.Contains(string(b), tc.holds) {
			t.Errorf("%s: %d %q, holds %q: %v", tc.path, resp.StatusCode, resp.Header.Get("Content-Type"), tc.holds, strings.Contains(string(b), tc.holds))
		}
		if csp := resp.Header.Get("Content-Security-Policy"); !strings.Contains(csp, "script-src 'self'") {
			t.Errorf("%s: policy %q", tc.path, csp)
		}
	}
	resp, err := http.Post(srv.URL+"/live/ack", "application/json", strings.NewReader(`{}`))
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusNotImplemented {
		t.Errorf("ack without an acknowledgement service: %d, want 501", resp.StatusCode)
	}
}

// TestEventStream reads the event stream over a real socket: a retry
// line, then a snapshot, then frames.
func TestEventStream(t *testing.T) {
	hub, srv := newTestServer(t, nil)
	hub.Samples("bed-1", samples(0, 100, 100))
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	req, _ := http.NewRequestWithContext(ctx, "GET", srv.URL+"/live/events?stream=bed-1", nil)
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	if ct := resp.Header.Get("Content-Type"); ct != "text/event-stream" {
		t.Fatalf("content type %q", ct)
	}
	rd := bufio.NewReader(resp.Body)
	var frames []frameDoc
	for len(frames) < 3 {
		line, err := rd.ReadBytes('\n')
		if err != nil {
			t.Fatalf("after %d frames: %v", len(frames), err)
		}
		if strings.HasPrefix(string(line), "data: ") {
			rest, _ := rd.ReadBytes('\n')
			frames = append(frames, parseSSE(t, append(line, rest...)))
			hub.Samples("bed-1", samples(float64(len(frames)), 100, 100))
		}
	}
	if !frames[0].Full || len(frames[0].Streams) != 1 || frames[0].Detail == nil || frames[0].Detail.ID != "bed-1" {
		t.Errorf("snapshot %+v", frames[0])
	}
	// The snapshot ends where the hub's last frame ended; what came after
	// arrives in the frames, so together they hold at least the first
	// second (50 points at 50 Hz).
	got := len(frames[0].Detail.Wave.TS)
	for _, f := range frames[1:] {
		if f.Full {
			t.Error("a second snapshot on the same connection")
		}
		if f.Detail != nil {
			got += len(f.Detail.Wave.TS)
		}
	}
	if got < 50 {
		t.Errorf("%d waveform points over the snapshot and two frames, want at least 50", got)
	}
}

// FuzzDecodeAck: any body gives a request within the limits or an error,
// never a panic.
func FuzzDecodeAck(f *testing.F) {
	f.Add([]byte(`{"stream":"s","id":"s/air-trapping/1","by":"x","note":""}`))
	f.Add([]byte(`{"stream":"s"}`))
	f.Add([]byte(`[]`))
	f.Add([]byte("{\"stream\":\"\xff\",\"id\":\"\\u0000\"}"))
	f.Fuzz(func(t *testing.T, b []byte) {
		req, err := decodeAck(strings.NewReader(string(b)))
		if err != nil {
			return
		}
		if req.Stream == "" || req.ID == "" || len(req.ID) > maxAckID || len(req.By) > maxAckBy || len(req.Note) > maxAckNote {
			t.Errorf("accepted %+v", req)
		}
	})
}

// FuzzAppendString: the hand-written string encoder gives JSON that
// encoding/json (the reference) decodes back to the same text.
func FuzzAppendString(f *testing.F) {
	for _, s := range []string{"", "icu-04", `<img src=x onerror="alert(1)">`, "a\"b\\c\n\t\u2028", "\xff\xfe", "ünï"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		b := appendString(nil, s)
		var got string
		if err := json.Unmarshal(b, &got); err != nil {
			t.Fatalf("%q encodes to invalid JSON %s: %v", s, b, err)
		}
		want := strings.ToValidUTF8(s, "\uFFFD")
		if utf8.ValidString(s) && got != want {
			t.Errorf("%q came back as %q", s, got)
		}
		if strings.ContainsAny(string(b), "<>\n") {
			t.Errorf("%q encodes with a raw <, > or newline: %s", s, b)
		}
	})
}
