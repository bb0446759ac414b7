package daemon

import (
	"net/http"
	"testing"
	"time"

	"trapline/config"
)

// The runtime's profiles are served under /debug/pprof/ only when
// http.pprof asks for them.
func TestPprofOnlyWhenAsked(t *testing.T) {
	for _, on := range []bool{false, true} {
		cfg := config.Default()
		cfg.DataDir = t.TempDir()
		cfg.HTTP.Listen = "127.0.0.1:0"
		cfg.HTTP.Pprof = on
		cfg.NATS.Embedded.Port = 0
		cfg.Streams = []config.Stream{{ID: "bench-a", Source: "tcp-listen://127.0.0.1:0"}}
		r := startDaemonWith(t, cfg, Options{})
		client := http.Client{Timeout: 5 * time.Second}
		resp, err := client.Get("http://" + r.info.HTTPAddr + "/debug/pprof/heap")
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		want := http.StatusNotFound
		if on {
			want = http.StatusOK
		}
		if resp.StatusCode != want {
			t.Errorf("http.pprof %v: /debug/pprof/heap = %d, want %d", on, resp.StatusCode, want)
		}
		if err := r.stop(); err != nil {
			t.Fatal(err)
		}
	}
}
