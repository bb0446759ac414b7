package daemon

import (
	"encoding/json"
	"io"
	"net/http"
	"runtime"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"trapline/config"
	"trapline/daemon/bus"
)

// TestRunStartsAndStopsCleanly runs the whole daemon in-process (embedded
// NATS on a free port, HTTP, one stream waiting for a TCP client), checks
// what a client sees, cancels it, and checks that Run returns promptly and
// leaves no goroutine behind.
func TestRunStartsAndStopsCleanly(t *testing.T) {
	baseline := runtime.NumGoroutine()
	dir := t.TempDir()
	cfg := config.Default()
	cfg.DataDir = dir
	cfg.HTTP.Listen = "127.0.0.1:0"
	cfg.NATS.Embedded.Port = 0
	cfg.Streams = []config.Stream{{ID: "bench-a", Source: "tcp-listen://127.0.0.1:0"}}
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	r := startDaemonWith(t, cfg, Options{})
	d, info := r.d, r.info

	client := http.Client{Timeout: 5 * time.Second, Transport: &http.Transport{DisableKeepAlives: true}}
	get := func(path string) (int, string) {
		resp, err := client.Get("http://" + info.HTTPAddr + path)
		if err != nil {
			t.Fatalf("GET %s: %v", path, err)
		}
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		return resp.StatusCode, string(b)
	}
	if code, _ := get("/healthz"); code != http.StatusOK {
		t.Errorf("/healthz = %d", code)
	}
	// No client has connected to the stream's listener: not ready, and
	// the reason names the stream.
	waitFor(t, 10*time.Second, "the JetStream streams", func() bool { return d.del.streamsReady() == nil })
	if code, body := get("/readyz"); code != http.StatusServiceUnavailable || !strings.Contains(body, "stream bench-a: source not connected") {
		t.Errorf("/readyz = %d %q, want 503 naming the stream", code, body)
	}
	if _, body := get("/metrics"); !strings.Contains(body, `trapline_stream_up{stream="bench-a"} 1`) {
		t.Errorf("/metrics lacks the running stream:\n%s", body)
	}

	nc, err := nats.Connect(info.NATSURL)
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		subject, body, wantErr string
	}{
		{"trapline.ack.bed-9", `{"id":"bed-9/air-trapping/1","by":"x"}`, `no stream "bed-9"`},
		{"trapline.ack.bench-a", `{"by":"x"}`, "empty id"},
		{"trapline.ack.bench-a", `{"id":"bench-a/air-trapping/1","by":"x"}`, "bench-a/air-trapping/1"},
	} {
		msg, err := nc.Request(tc.subject, []byte(tc.body), 5*time.Second)
		if err != nil {
			t.Fatalf("request %s: %v", tc.subject, err)
		}
		var r bus.AckReply
		if err := json.Unmarshal(msg.Data, &r); err != nil || r.OK || !strings.Contains(r.Error, tc.wantErr) {
			t.Errorf("ack %s %s: reply %s, want an error containing %q", tc.subject, tc.body, msg.Data, tc.wantErr)
		}
	}
	nc.Close()

	if err := r.stop(); err != nil {
		t.Errorf("Run returned %v after cancellation", err)
	}
	// Every goroutine the daemon started has ended (a few of the runtime's
	// and the test's own may come and go: allow two).
	waitFor(t, 10*time.Second, "the daemon's goroutines to end", func() bool {
		return runtime.NumGoroutine() <= baseline+2
	})
}
