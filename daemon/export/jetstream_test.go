package export

import (
	"bytes"
	"context"
	"encoding/json"
	"net"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"trapline/alerts"
)

// startJetStream starts an embedded server on a random loopback port with
// the daemon's streams, and returns a JetStream client.
func startJetStream(t *testing.T, cfg alerts.StreamsConfig) jetstream.JetStream {
	t.Helper()
	srv, err := server.NewServer(&server.Options{
		ServerName: "export-test", Host: "127.0.0.1", Port: -1, JetStream: true, StoreDir: t.TempDir(),
		JetStreamMaxStore: 128 << 20, JetStreamMaxMemory: 16 << 20, NoSigs: true, NoLog: true,
	})
	if err != nil {
		t.Fatal(err)
	}
	srv.Start()
	t.Cleanup(func() { srv.Shutdown(); srv.WaitForShutdown() })
	if !srv.ReadyForConnections(10 * time.Second) {
		t.Fatal("nats server did not start")
	}
	nc, err := nats.Connect("nats://" + srv.Addr().(*net.TCPAddr).String())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	if err := alerts.EnsureStreams(t.Context(), js, cfg); err != nil {
		t.Fatal(err)
	}
	return js
}

// TestJetStreamExport publishes the test NDJSON as the daemon does (one
// message per record on <prefix>.<kind>.<stream>) and exports it back from
// the streams: the same rows and values as the NDJSON, and one stream's
// records alone when asked.
func TestJetStreamExport(t *testing.T) {
	cfg := alerts.StreamsConfig{AlertsMaxBytes: 16 << 20, BreathsMaxBytes: 16 << 20}
	js := startJetStream(t, cfg)
	subj := alerts.Subjects{}
	data, err := os.ReadFile(ndjsonFile)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	lines := bytes.Split(bytes.TrimSpace(data), []byte("\n"))
	for _, line := range lines {
		var head struct{ Type, Stream string }
		_ = json.Unmarshal(line, &head)
		if _, err := js.Publish(ctx, subj.Subject(head.Type, head.Stream), line); err != nil {
			t.Fatal(err)
		}
	}
	other := []byte(`{"type":"breath","schema":1,"stream":"bed-9","seq":0,"t_start_s":0}`)
	if _, err := js.Publish(ctx, subj.Breath("bed-9"), other); err != nil {
		t.Fatal(err)
	}
	want := expected(t)
	dir := t.TempDir()
	res, err := ToFiles(ctx, JetStream(ctx, js, JetStreamOptions{Streams: cfg, Stream: "default"}), Options{Dir: dir, Formats: []Format{Parquet}})
	if err != nil {
		t.Fatal(err)
	}
	for _, k := range Kinds {
		got := readParquet(t, filepath.Join(dir, fileName("trapline", k, Parquet)))
		if len(got) != len(want[k]) {
			t.Fatalf("%s: %d rows, want %d", k, len(got), len(want[k]))
		}
		for i, w := range want[k] {
			for key, wv := range w {
				equalValue(t, string(k)+" "+key, got[i][key], wv)
			}
		}
	}
	res, err = ToFiles(ctx, JetStream(ctx, js, JetStreamOptions{Streams: cfg}), Options{Dir: t.TempDir(), Formats: []Format{CSV}})
	if err != nil {
		t.Fatal(err)
	}
	if res.Rows[KindBreath] != len(want[KindBreath])+1 || res.Rows[KindAlert] != len(want[KindAlert]) {
		t.Errorf("all streams: rows %v", res.Rows)
	}
	res, err = ToFiles(ctx, JetStream(ctx, js, JetStreamOptions{Streams: cfg, From: time.Now().Add(time.Hour)}), Options{Dir: t.TempDir(), Formats: []Format{CSV}})
	if err != nil || res.Rows[KindBreath]+res.Rows[KindAlert] != 0 {
		t.Errorf("a range after the last message: rows %v, err %v", res.Rows, err)
	}
}
