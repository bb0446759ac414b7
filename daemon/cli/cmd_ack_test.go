package cli

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"trapline/alerts"
	"trapline/config"
	"trapline/daemon"
	"trapline/daemon/daemontest"
	"trapline/internal/freeport"
)

// TestAckVerb runs the daemon in-process (embedded NATS on a free port),
// feeds it a trapping patient over TCP at 20× real time, waits for the
// air-trapping alarm and acknowledges it with the verb; a second ack of an
// unknown id is refused with exit 1. Then export reads the same daemon's
// JetStream streams.
func TestAckVerb(t *testing.T) {
	port := strconv.Itoa(freeport.Take(t))
	cfg := config.Default()
	cfg.DataDir = t.TempDir()
	cfg.NATS.Embedded.Port = 0
	cfg.HTTP.Listen = ""
	cfg.Streams = []config.Stream{{ID: "bed-7", Source: "tcp-listen://127.0.0.1:" + port}}
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	dm := daemontest.Start(t, cfg, daemon.Options{})
	nc, err := nats.Connect(dm.Info.NATSURL)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	var mu sync.Mutex
	var evs []alerts.Event
	if _, err := nc.Subscribe("trapline.alert.>", func(m *nats.Msg) {
		var e alerts.Event
		if json.Unmarshal(m.Data, &e) == nil {
			mu.Lock()
			evs = append(evs, e)
			mu.Unlock()
		}
	}); err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil { // the subscriptions are in place on the server
		t.Fatal(err)
	}
	go Run(t.Context(), []string{"sim", "--scenario", "hyperinflation", "--speed", "20", "--out", "tcp://127.0.0.1:" + port,
		"--log-level", "error"}, nil, &strings.Builder{}, &strings.Builder{})

	var id string
	waitFor(t, 30*time.Second, "an air-trapping alarm", func() bool {
		mu.Lock()
		defer mu.Unlock()
		for _, e := range evs {
			if e.Condition == "air-trapping" && e.State == alerts.Raised {
				id = e.ID
				return true
			}
		}
		return false
	})
	out := run(t, ExitOK, nil, "ack", id, "--by", "tester", "--why", "settings changed", "--nats-url", dm.Info.NATSURL)
	if !strings.Contains(out, `"ok":true`) {
		t.Errorf("ack printed %q", out)
	}
	waitFor(t, 10*time.Second, "the acknowledged event", func() bool {
		mu.Lock()
		defer mu.Unlock()
		for _, e := range evs {
			if e.ID == id && e.State == alerts.Acknowledged {
				return true
			}
		}
		return false
	})
	var stdout, stderr strings.Builder
	code := Run(t.Context(), []string{"ack", "bed-7/air-trapping/1", "--by", "tester", "--nats-url", dm.Info.NATSURL,
		"--log-level", "error"}, nil, &stdout, &stderr)
	if code != ExitError || !strings.Contains(stderr.String(), "refused") {
		t.Errorf("ack of an unknown id: exit %d, stdout %q, stderr %q", code, stdout.String(), stderr.String())
	}
	// The same daemon's JetStream streams, exported: the alarm's raise and
	// acknowledgement are rows of the alerts file.
	exp := filepath.Join(t.TempDir(), "x")
	msg := run(t, ExitOK, nil, "export", "--from-nats", "--nats-url", dm.Info.NATSURL, "--stream", "bed-7",
		"--formats", "csv", "--wait", "2s", "--out", exp)
	csvData, err := os.ReadFile(filepath.Join(exp, "trapline-alerts.csv"))
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(string(csvData), id+",bed-7,air-trapping,physiological,medium,acknowledged") ||
		!strings.Contains(msg, "breath records") {
		t.Errorf("export from JetStream: %s\n%s", msg, csvData)
	}
	if err := dm.Stop(); err != nil {
		t.Fatalf("daemon: %v", err)
	}
}
