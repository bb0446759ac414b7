package tests

import (
	"context"
	"encoding/json"
	"fmt"
	"path/filepath"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"trapline/alerts"
	"trapline/daemon/cli"
	"trapline/ingest"
	"trapline/internal/freeport"
	"trapline/simulator"
)

// alertLog collects the alert events a subscriber receives.
type alertLog struct {
	mu     sync.Mutex
	events []alerts.Event
}

func (l *alertLog) add(data []byte) {
	var ev alerts.Event
	if json.Unmarshal(data, &ev) != nil {
		return
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	l.events = append(l.events, ev)
}

func (l *alertLog) snapshot() []alerts.Event {
	l.mu.Lock()
	defer l.mu.Unlock()
	return append([]alerts.Event(nil), l.events...)
}

// find returns the index of the first event of the condition in the state,
// or -1.
func find(evs []alerts.Event, condition string, state alerts.State) int {
	for i, ev := range evs {
		if ev.Condition == condition && ev.State == state {
			return i
		}
	}
	return -1
}

// streamScenario plays a shipped scenario over a pseudo-terminal whose
// stable link is link, at speed, and returns when it has played. It runs on
// goroutines of its own, so it returns its errors rather than failing the
// test.
func streamScenario(ctx context.Context, name, stream, link string, speed float64) error {
	return streamScenarioText(ctx, name, stream, link, speed, ingest.TextEncoderOptions{Decimals: 4})
}

// streamScenarioText is streamScenario with the text format's options (a
// stream column for a multiplexed source).
func streamScenarioText(ctx context.Context, name, stream, link string, speed float64, opts ingest.TextEncoderOptions) error {
	sc, err := simulator.Shipped(name)
	if err != nil {
		return err
	}
	sc.Stream = stream
	sim, err := simulator.New(sc)
	if err != nil {
		return err
	}
	out, err := simulator.ParseOutput("pty", simulator.OutputOptions{Link: link})
	if err != nil {
		return err
	}
	enc, err := ingest.NewTextEncoder(opts)
	if err != nil {
		return err
	}
	_, err = simulator.Stream(ctx, sim, out, simulator.StreamOptions{Encoder: enc, Speed: speed})
	return err
}

// TestEndToEndOverPseudoTerminal: the simulator writes a patient to a
// pseudo-terminal, the daemon reads it as a serial port and publishes to
// its embedded NATS server, a subscriber receives the alerts.
func TestEndToEndOverPseudoTerminal(t *testing.T) {
	t.Parallel() // waits on the simulator most of the time
	for _, tc := range []struct {
		scenario    string
		speed       float64
		wantTrapped bool
	}{
		// bronchospasm: resistance climbs from minute 2 to 8, air trapping
		// builds; settings changes from minute 11 resolve it.
		{"bronchospasm", 90, true},
		// stable: a healthy lung; no physiological condition at all.
		{"stable", 90, false},
	} {
		t.Run(tc.scenario, func(t *testing.T) {
			dir := t.TempDir()
			link := filepath.Join(dir, "ventilator")
			natsPort := freeport.Take(t)
			cfg := writeConfig(t, fmt.Sprintf(`data_dir: %s
http:
  listen: ""
log:
  level: warn
nats:
  embedded:
    port: %d
# What the subscriber saw is compared with JetStream: no signal-lost
# alert may race in when the patient's recording ends.
detectors:
  signal:
    lost_after_s: 600
streams:
  - id: bed-1
    source: serial://%s?baud=115200
`, dir, natsPort, link))
			ctx, cancel := context.WithTimeout(t.Context(), 3*time.Minute)
			defer cancel()
			dctx, stopDaemon := context.WithCancel(ctx)
			defer stopDaemon()
			codec := make(chan int, 1)
			var dout string
			go func() {
				code, out := runDaemon(dctx, "run", "--config", cfg)
				dout = out
				codec <- code
			}()

			var nc *nats.Conn
			waitFor(t, 30*time.Second, "the daemon's NATS server", func() bool {
				c, err := nats.Connect(fmt.Sprintf("nats://127.0.0.1:%d", natsPort))
				if err == nil {
					nc = c
				}
				return err == nil
			})
			defer nc.Close()
			var got alertLog
			sub, err := nc.Subscribe("trapline.alert.>", func(m *nats.Msg) { got.add(m.Data) })
			if err != nil {
				t.Fatal(err)
			}
			defer sub.Unsubscribe()
			breaths := make(chan struct{}, 1)
			bsub, err := nc.Subscribe("trapline.breath.bed-1", func(*nats.Msg) {
				select {
				case breaths <- struct{}{}:
				default:
				}
			})
			if err != nil {
				t.Fatal(err)
			}
			defer bsub.Unsubscribe()

			simDone := make(chan error, 1)
			go func() { simDone <- streamScenario(ctx, tc.scenario, "bed-1", link, tc.speed) }()
			if tc.wantTrapped {
				// When air trapping is raised, someone acknowledges it over
				// NATS; the acknowledged state follows on the alert subject.
				waitFor(t, 60*time.Second, "air-trapping to be raised", func() bool {
					return find(got.snapshot(), "air-trapping", alerts.Raised) >= 0
				})
				evs := got.snapshot()
				id := evs[find(evs, "air-trapping", alerts.Raised)].ID
				for _, req := range []struct {
					body   string
					wantOK bool
				}{
					{`{"id":"` + id + `","by":"bench tester"}`, true},
					{`{"id":"bed-1/air-trapping/0","by":"bench tester"}`, false},
					{`not json`, false},
				} {
					reply, err := nc.Request("trapline.ack.bed-1", []byte(req.body), 10*time.Second)
					if err != nil {
						t.Fatalf("ack request %s: %v", req.body, err)
					}
					var r struct {
						OK    bool   `json:"ok"`
						Error string `json:"error"`
					}
					if err := json.Unmarshal(reply.Data, &r); err != nil || r.OK != req.wantOK || (!r.OK && r.Error == "") {
						t.Errorf("ack %s: reply %s, want ok=%v", req.body, reply.Data, req.wantOK)
					}
				}
				waitFor(t, 10*time.Second, "the acknowledged event", func() bool {
					return find(got.snapshot(), "air-trapping", alerts.Acknowledged) >= 0
				})
				// Nobody but the daemon may publish: a forged "cleared" of the
				// real id never reaches JetStream (checkOnce below).
				checkForgeryRefused(t, fmt.Sprintf("nats://127.0.0.1:%d", natsPort), "bed-1", id)
			}
			if err := <-simDone; err != nil {
				t.Fatalf("simulator: %v", err)
			}
			select {
			case <-breaths:
			default:
				t.Fatal("no breath record arrived")
			}
			// Let the last breaths and alerts through; what the subscriber
			// saw must be what JetStream kept, once each.
			time.Sleep(time.Second)
			js, err := jetstream.New(nc)
			if err != nil {
				t.Fatal(err)
			}
			var stored []alerts.Event
			waitFor(t, 20*time.Second, "JetStream to hold every alert event seen", func() bool {
				stored = storedAlerts(t, js, "TRAPLINE_ALERTS")
				return len(stored) >= len(got.snapshot())
			})
			checkOnce(t, stored, got.snapshot())
			stopDaemon()
			select {
			case code := <-codec:
				if code != cli.ExitOK {
					t.Errorf("daemon exit code %d:\n%s", code, dout)
				}
			case <-time.After(30 * time.Second):
				t.Fatal("daemon did not stop within 30 s")
			}

			evs := got.snapshot()
			raised, cleared := find(evs, "air-trapping", alerts.Raised), find(evs, "air-trapping", alerts.Cleared)
			if tc.wantTrapped {
				if raised < 0 || cleared < 0 || cleared < raised || evs[raised].ID != evs[cleared].ID {
					t.Errorf("want air-trapping raised then cleared (same id), got:\n%s", describe(evs))
				}
			} else {
				for _, ev := range evs {
					if ev.Class == "physiological" {
						t.Errorf("stable patient: unexpected %s %s", ev.Condition, ev.State)
					}
				}
			}
			t.Logf("%s: %d alert events:\n%s", tc.scenario, len(evs), describe(evs))
		})
	}
}

func describe(evs []alerts.Event) string {
	var b strings.Builder
	for _, ev := range evs {
		fmt.Fprintf(&b, "  t=%7.1fs %-22s %-12s %s\n", ev.TS, ev.Condition, ev.State, ev.ID)
	}
	return b.String()
}

// storedAlerts reads every alert event kept in the JetStream stream.
func storedAlerts(t *testing.T, js jetstream.JetStream, name string) []alerts.Event {
	t.Helper()
	ctx, cancel := context.WithTimeout(t.Context(), 20*time.Second)
	defer cancel()
	s, err := js.Stream(ctx, name)
	if err != nil {
		t.Fatalf("stream %s: %v", name, err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		t.Fatalf("stream %s info: %v", name, err)
	}
	var out []alerts.Event
	for seq := info.State.FirstSeq; seq <= info.State.LastSeq && info.State.Msgs > 0; seq++ {
		m, err := s.GetMsg(ctx, seq)
		if err != nil {
			continue // deleted
		}
		var ev alerts.Event
		if err := json.Unmarshal(m.Data, &ev); err != nil {
			t.Errorf("stored message %d is not an alert event: %v", seq, err)
			continue
		}
		out = append(out, ev)
	}
	return out
}

// checkOnce checks that stored holds every event of want exactly once (by
// id and state), and nothing else.
func checkOnce(t *testing.T, stored, want []alerts.Event) {
	t.Helper()
	count := map[string]int{}
	for _, ev := range stored {
		count[ev.DedupID()]++
	}
	for k, n := range count {
		if n != 1 {
			t.Errorf("event %s stored %d times, want once", k, n)
		}
	}
	seen := map[string]bool{}
	for _, ev := range want {
		if seen[ev.DedupID()] {
			continue
		}
		seen[ev.DedupID()] = true
		if count[ev.DedupID()] == 0 {
			t.Errorf("event %s missing from JetStream", ev.DedupID())
		}
	}
	if len(count) != len(seen) {
		t.Errorf("JetStream holds %d distinct events, want %d", len(count), len(seen))
	}
}

// TestDemoRunsToItsSummary runs `trapline demo` on its default scenario
// (bronchospasm: air trapping that settings changes then resolve; fast,
// plain output) as a user would: it prints the live view's address and its
// caution at the start and the end, an escalation reads as one alarm moving
// up, its own lines fit 80 columns, and the summary counts alarms and ends
// with none still open.
func TestDemoRunsToItsSummary(t *testing.T) {
	ctx, cancel := context.WithTimeout(t.Context(), 2*time.Minute)
	defer cancel()
	code, out := runDaemon(ctx, "demo", "--speed", "200", "--plain")
	if code != cli.ExitOK {
		t.Fatalf("demo exit code %d:\n%s", code, out)
	}
	if n := strings.Count(out, cli.Caution); n != 2 {
		t.Errorf("caution printed %d times, want at the start and at the end", n)
	}
	if !regexp.MustCompile(`demo: live view in your browser at http://127\.0\.0\.1:\d+/live/`).MatchString(out) {
		t.Errorf("no live view address in the output")
	}
	for _, want := range []string{"RAISED    air-trapping (low)", "ESCALATED air-trapping low → medium", "CLEARED   air-trapping"} {
		if !strings.Contains(out, want) {
			t.Errorf("demo output lacks %q", want)
		}
	}
	for _, l := range strings.Split(out, "\n") {
		if l != cli.Caution && !strings.HasPrefix(l, "{") && len([]rune(l)) > 80 {
			t.Errorf("line wider than 80 columns: %q", l)
		}
	}
	i := strings.LastIndex(out, "demo: finished after")
	if i < 0 {
		t.Fatalf("no summary:\n%s", out)
	}
	sum := out[i:]
	// The total line, in the long or the short wording of tui.SummaryLines.
	total := regexp.MustCompile(`(?m)^all +(\d+) alarms?: .*$`).FindStringSubmatch(sum)
	if total == nil || !strings.Contains(sum, "air-trapping") {
		t.Fatalf("no total line or no air-trapping alarm in the summary:\n%s", sum)
	}
	count := func(what string) string {
		m := regexp.MustCompile(`(\d+) ` + what + `\b|` + what + ` (\d+)`).FindStringSubmatch(total[0])
		if m == nil {
			t.Fatalf("total line %q does not count %s", total[0], what)
		}
		return m[1] + m[2]
	}
	if count("open") != "0" || count("cleared") != total[1] || total[1] == "0" {
		t.Errorf("summary total %q: want some alarms, all cleared, 0 open", total[0])
	}
	t.Logf("%s", sum)
}
