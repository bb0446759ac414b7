package tests

import (
	"bytes"
	"encoding/json"
	"fmt"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"trapline/config"
	"trapline/daemon"
	"trapline/daemon/cli"
	"trapline/daemon/daemontest"
	"trapline/internal/freeport"
)

// liveLog gathers what the daemon publishes, per stream, as received.
type liveLog struct {
	mu      sync.Mutex
	breaths map[string][]string
	alerts  map[string][]string
}

func (l *liveLog) add(kind string, data []byte) {
	var head struct{ Stream string }
	if json.Unmarshal(data, &head) != nil {
		return
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	if kind == "breath" {
		l.breaths[head.Stream] = append(l.breaths[head.Stream], string(data))
	} else {
		l.alerts[head.Stream] = append(l.alerts[head.Stream], comparableAlert(data))
	}
}

func (l *liveLog) count() int {
	l.mu.Lock()
	defer l.mu.Unlock()
	n := 0
	for _, b := range l.breaths {
		n += len(b)
	}
	return n
}

// comparableAlert drops the fields of an alert event that depend on the
// wall clock: its id (the wall time of the raise), its time, and the id it
// supersedes. Live, wall time runs with the receive time; offline it is the
// stream time from the epoch. Technical conditions are judged on the
// once-a-second tick, which live follows the wall clock and offline the
// stream time: fed at 20× real time, the live daemon ticks once per 20 s of
// signal, so of those only the condition and state are compared.
func comparableAlert(data []byte) string {
	var m map[string]any
	if json.Unmarshal(data, &m) != nil {
		return string(data)
	}
	if m["class"] == "technical" {
		return fmt.Sprintf("%v %v %v", m["condition"], m["state"], m["config_digest"])
	}
	delete(m, "id")
	delete(m, "time")
	delete(m, "supersedes")
	b, _ := json.Marshal(m)
	return string(b)
}

// TestRecordAnalyzeRoundTrip runs the daemon on three simulated patients
// (60 s of stream time each, fed over TCP at 20× real time) with the
// recording on, stops it, and analyses the recording with `trapline
// analyze`: per stream, the breath records are the same bytes as those
// published live, and the alert events the same apart from their wall-clock
// fields.
func TestRecordAnalyzeRoundTrip(t *testing.T) {
	dir := t.TempDir()
	cfg := config.Default()
	cfg.DataDir = dir
	cfg.NATS.Embedded.Port = 0
	cfg.HTTP.Listen = ""
	cfg.Recording.Enabled = true
	scenarios := []string{"hyperinflation", "bronchospasm", "noisy"}
	ports := make([]string, len(scenarios))
	for i := range scenarios {
		ports[i] = strconv.Itoa(freeport.Take(t))
		cfg.Streams = append(cfg.Streams, config.Stream{ID: "bed-" + strconv.Itoa(i+1), Source: "tcp-listen://127.0.0.1:" + ports[i]})
	}
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	run := daemontest.Start(t, cfg, daemon.Options{})
	nc, err := nats.Connect(run.Info.NATSURL)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	live := &liveLog{breaths: map[string][]string{}, alerts: map[string][]string{}}
	for _, kind := range []string{"breath", "alert"} {
		if _, err := nc.Subscribe("trapline."+kind+".>", func(m *nats.Msg) { live.add(kind, m.Data) }); err != nil {
			t.Fatal(err)
		}
	}
	if err := nc.Flush(); err != nil { // the subscriptions are in place on the server
		t.Fatal(err)
	}
	var sims sync.WaitGroup
	for i, sc := range scenarios {
		sims.Add(1)
		go func() {
			defer sims.Done()
			var errb bytes.Buffer
			if code := cli.Run(t.Context(), []string{"sim", "--scenario", sc, "--speed", "20", "--duration", "60s", "--seed", "5",
				"--out", "tcp://127.0.0.1:" + ports[i], "--log-level", "error"}, nil, &bytes.Buffer{}, &errb); code != cli.ExitOK {
				t.Errorf("sim %s: exit %d: %s", sc, code, errb.String())
			}
		}()
	}
	sims.Wait()
	// Let the last breaths reach NATS: wait until the count stands still.
	last := -1
	for n := live.count(); n != last; n = live.count() {
		last = n
		time.Sleep(300 * time.Millisecond)
	}
	if err := run.Stop(); err != nil {
		t.Fatalf("daemon: %v", err)
	}

	var out, errb bytes.Buffer
	if code := cli.Run(t.Context(), []string{"analyze", "--log-level", "error", cfg.RecordingDir()}, nil, &out, &errb); code != cli.ExitOK {
		t.Fatalf("analyze: exit %d: %s", code, errb.String())
	}
	off := &liveLog{breaths: map[string][]string{}, alerts: map[string][]string{}}
	for _, line := range strings.Split(strings.TrimSpace(out.String()), "\n") {
		kind := "alert"
		if strings.HasPrefix(line, `{"type":"breath"`) {
			kind = "breath"
		}
		off.add(kind, []byte(line))
	}
	for _, sc := range cfg.Streams {
		lb, ob := live.breaths[sc.ID], off.breaths[sc.ID]
		for i := range min(len(lb), len(ob)) {
			if lb[i] != ob[i] {
				t.Logf("first difference, breath %d:\nlive      %s\nrecording %s", i, lb[i], ob[i])
				break
			}
		}
		if len(lb) < 10 || !slices.Equal(lb, ob) {
			t.Errorf("%s: %d live breath records, %d from the recording; equal: %v", sc.ID, len(lb), len(ob), slices.Equal(lb, ob))
		}
		la, oa := live.alerts[sc.ID], off.alerts[sc.ID]
		if !slices.Equal(la, oa) {
			t.Errorf("%s alert events differ:\nlive      %v\nrecording %v", sc.ID, la, oa)
		}
		t.Logf("%s: %d breath records, %d alert events", sc.ID, len(lb), len(la))
	}
}
