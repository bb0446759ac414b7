package tests

import (
	"context"
	"fmt"
	"path/filepath"
	"sort"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"trapline/alerts"
	"trapline/internal/freeport"
)

// agreeKeys keeps of each clinical alert event what does not depend on the
// wall clock or the process: condition, state, priority, stream time and
// breath number.
func agreeKeys(evs []alerts.Event) []string {
	var out []string
	for _, ev := range evs {
		if ev.Class == "technical" {
			continue // signal and decoder checks run on the wall clock
		}
		seq := "-"
		if ev.BreathSeq != nil {
			seq = fmt.Sprint(*ev.BreathSeq)
		}
		out = append(out, fmt.Sprintf("%s %s %s t=%.3f breath=%s", ev.Condition, ev.State, ev.Priority, ev.TS, seq))
	}
	sort.Strings(out)
	return out
}

// storedKeys waits (at most 40 s) until js's alert stream holds n clinical
// events, and returns their keys.
func storedKeys(t *testing.T, js jetstream.JetStream, n int) []string {
	t.Helper()
	var got []string
	pollUntil(40*time.Second, func() bool {
		evs, err := readAlerts(t.Context(), js)
		if err != nil {
			return false
		}
		got = agreeKeys(evs)
		return len(got) >= n
	})
	return got
}

// TestThreePipelinesAgree feeds one simulated air-trapping recording to the
// three callers of the per-stream pipeline: `trapline analyze`, the daemon
// (role all, its embedded NATS, a file source) and the scale-out roles (an
// edge and a worker on one NATS server). All three must store the same
// clinical alert events.
func TestThreePipelinesAgree(t *testing.T) {
	dir := t.TempDir()
	file := simFile(t, dir, "hyper", "hyperinflation", 600*time.Second)
	ref, _ := reference(t, file, "bed-1")
	want := agreeKeys(ref)
	if len(want) == 0 {
		t.Fatal("the recording raises no alert: the comparison would be empty")
	}
	ctx, cancel := context.WithTimeout(t.Context(), 2*time.Minute)
	var wg sync.WaitGroup
	defer wg.Wait()
	defer cancel()
	var mu sync.Mutex
	var logs []string
	run := func(cfg string) chan struct{} {
		done := make(chan struct{})
		wg.Add(1)
		go func() {
			defer wg.Done()
			defer close(done)
			code, out := runDaemon(ctx, "run", "-c", cfg)
			mu.Lock()
			logs = append(logs, fmt.Sprintf("%s: exit %d\n%s", cfg, code, out))
			mu.Unlock()
		}()
		return done
	}
	t.Cleanup(func() {
		if t.Failed() {
			mu.Lock()
			defer mu.Unlock()
			for _, l := range logs {
				t.Log(l)
			}
		}
	})

	// The daemon stops by itself once its only stream, a recording, is
	// finished; its alerts are then read from the store it leaves.
	allDir := t.TempDir()
	allDone := run(writeConfig(t, fmt.Sprintf("role: all\ndata_dir: %s\nhttp: {listen: \"\"}\nlog: {level: warn}\n"+
		"nats: {embedded: {port: 0}}\nstreams:\n  - id: bed-1\n    source: file://%s?pace=max\n", allDir, file)))

	ns := startNATS(t)
	run(writeConfig(t, fmt.Sprintf("role: worker\ndata_dir: %s\nhttp: {listen: \"\"}\nlog: {level: warn}\n"+
		"nats: {url: \"%s\", breaths_stream: {max_bytes: 32MiB}}\nscaleout: {partitions: 2, worker_id: w1, heartbeat: 300ms, member_ttl: 1500ms, checkpoint: 500ms}\n",
		t.TempDir(), ns.URL())))
	js := jetStreamOf(t, ns.URL())
	if !pollUntil(30*time.Second, func() bool {
		kv, err := js.KeyValue(ctx, "TRAPLINE_MEMBERS")
		if err != nil {
			return false
		}
		keys, err := kv.Keys(ctx)
		return err == nil && len(keys) >= 1
	}) {
		t.Fatal("the worker did not join within 30 s")
	}
	run(writeConfig(t, fmt.Sprintf("role: edge\ndata_dir: %s\nhttp: {listen: \"\"}\nlog: {level: warn}\n"+
		"nats: {url: \"%s\"}\nscaleout: {partitions: 2}\nstreams:\n  - id: bed-1\n    source: file://%s?pace=max\n",
		t.TempDir(), ns.URL(), file)))

	select {
	case <-allDone:
	case <-ctx.Done():
		t.Fatal("the daemon did not finish its recording")
	}
	store := &natsServer{t: t, port: freeport.Take(t), store: filepath.Join(allDir, "nats")}
	store.start()
	t.Cleanup(store.stop)
	for name, js := range map[string]jetstream.JetStream{
		"daemon": jetStreamOf(t, store.URL()),
		"worker": js,
	} {
		got := storedKeys(t, js, len(want))
		if onlyWant, onlyGot := diffLists(want, got); len(onlyWant)+len(onlyGot) > 0 {
			t.Errorf("%s: alert events differ from analyze:\nmissing %v\nextra %v", name, onlyWant, onlyGot)
		}
	}
	t.Logf("%d clinical alert events agree", len(want))
}
