package tests

import (
	"context"
	"fmt"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"trapline/daemon/cli"
)

// scaleAssets are the streams behind every stream and bucket of the
// scale-out roles with the default prefix.
var scaleAssets = []string{"TRAPLINE_SAMPLES", "TRAPLINE_ALERTS", "TRAPLINE_BREATHS", "KV_TRAPLINE_MEMBERS", "KV_TRAPLINE_STATE"}

// replicasOf returns the replica count of each asset that exists.
func replicasOf(t *testing.T, js jetstream.JetStream) map[string]int {
	t.Helper()
	out := map[string]int{}
	for _, name := range scaleAssets {
		ctx, cancel := context.WithTimeout(t.Context(), 5*time.Second)
		s, err := js.Stream(ctx, name)
		cancel()
		if err == nil {
			out[name] = s.CachedInfo().Config.Replicas
		}
	}
	return out
}

// TestClusterReplicasNeverLowered starts a worker with scaleout.replicas 3,
// then one with no replica setting at all (the automatic count on a
// cluster is 3, and nats.replicas, which defaults to 1, is not used by the
// scale-out roles): every stream and bucket stays at R3. A worker that
// asks for 1 replica is refused with an error naming the stream.
func TestClusterReplicasNeverLowered(t *testing.T) {
	c := startCluster(t)
	nc, err := nats.Connect(c.urls())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(t.Context(), 50*time.Second)
	defer cancel()
	var wg sync.WaitGroup
	defer wg.Wait()
	defer cancel()
	const base = "role: worker\ndata_dir: %s\nhttp: {listen: \"\"}\nlog: {level: warn}\nnats: {url: \"%s\"}\nscaleout: {partitions: 4, worker_id: %s%s}\n"
	first := writeConfig(t, fmt.Sprintf(base, t.TempDir(), c.urls(), "w1", ", replicas: 3"))
	wg.Add(1)
	go func() { defer wg.Done(); runDaemon(ctx, "run", "-c", first) }()
	if !pollUntil(30*time.Second, func() bool { return len(replicasOf(t, js)) == len(scaleAssets) }) {
		t.Fatalf("the first worker did not create every stream and bucket: %v", replicasOf(t, js))
	}

	plain := writeConfig(t, fmt.Sprintf(base, t.TempDir(), c.urls(), "w2", ""))
	wg.Add(1)
	var plainOut string
	go func() { defer wg.Done(); _, plainOut = runDaemon(ctx, "run", "-c", plain) }()
	// The second worker has joined once it is in the membership bucket.
	if !pollUntil(20*time.Second, func() bool {
		kv, err := js.KeyValue(ctx, "TRAPLINE_MEMBERS")
		if err != nil {
			return false
		}
		_, err = kv.Get(ctx, "w2")
		return err == nil
	}) {
		cancel()
		wg.Wait()
		t.Fatalf("the worker without replica settings did not join within 20 s:\n%.3000s", plainOut)
	}
	for name, r := range replicasOf(t, js) {
		if r != 3 {
			t.Errorf("%s has %d replicas after a worker without replica settings started, want 3", name, r)
		}
	}

	// Asking for fewer replicas than the cluster has is refused at start.
	lower := writeConfig(t, fmt.Sprintf(base, t.TempDir(), c.urls(), "w3", ", replicas: 1"))
	rctx, rcancel := context.WithTimeout(ctx, 20*time.Second)
	defer rcancel()
	code, out := runDaemon(rctx, "run", "-c", lower)
	if code == cli.ExitOK || !strings.Contains(out, "refusing to lower") || !strings.Contains(out, "TRAPLINE_SAMPLES") {
		t.Errorf("a worker with replicas 1 against R3: exit %d, want a refusal naming the stream; output:\n%.1500s", code, out)
	}
	for name, r := range replicasOf(t, js) {
		if r != 3 {
			t.Errorf("%s has %d replicas after the refused worker, want 3", name, r)
		}
	}
}
