package daemon

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"net"
	"os"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	dto "github.com/prometheus/client_model/go"
	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/config"
	"trapline/daemon/bus"
	"trapline/ingest"
	"trapline/ingest/offline"
	"trapline/simulator"
)

// twoPatients are two steady patients of different rates (15 and 20
// breaths a minute), with noise and seeds of their own.
func twoPatients(t *testing.T) []simulator.Scenario {
	var scs []simulator.Scenario
	for k, rate := range []float64{15, 20} {
		sc := simulator.Steady{RCmH2OSPerL: 10 + 8*float64(k), CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: rate,
			PEEPCmH2O: 5, SampleRateHz: 100, DurationS: 90, PressureNoiseCmH2O: 0.2, FlowNoiseLPM: 0.5,
			Seed: uint64(k + 1)}.Scenario()
		sc.Stream = []string{"bed-a", "bed-b"}[k]
		scs = append(scs, sc)
	}
	return scs
}

func newSim(t *testing.T, sc simulator.Scenario) *simulator.Sim {
	s, err := simulator.New(sc)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

// aloneBreaths records one patient alone and returns its breath records as
// the analysis of that recording gives them.
func aloneBreaths(t *testing.T, sc simulator.Scenario, format ingest.Format) []string {
	var enc ingest.Encoder
	if format == ingest.FormatText {
		enc, _ = ingest.NewTextEncoder(ingest.TextEncoderOptions{})
	} else {
		enc, _ = ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: sc.SampleRateHz, Time: true})
	}
	var out bytes.Buffer
	if _, err := simulator.Stream(t.Context(), newSim(t, sc), simulator.WriterOutput(&out), simulator.StreamOptions{Encoder: enc, StreamColumn: true}); err != nil {
		t.Fatal(err)
	}
	var got []string
	def := config.Default()
	version, digest := config.ProgramVersion(), config.AnalysisDigest(def.Analysis, def.Detectors, def.Alarms)
	_, err := offline.Run(t.Context(), bytes.NewReader(out.Bytes()), offline.Options{Format: format},
		func(stream string) offline.Handler {
			a := analyze.NewAnalyzer(stream, def.Analysis)
			return func(samples []ingest.Sample) {
				for _, s := range samples {
					if b, ok := a.Push(s); ok {
						// The daemon's pipeline stamps its provenance.
						b.TraplineVersion, b.ConfigDigest = version, digest
						got = append(got, string(b.AppendJSON(nil)))
					}
				}
			}
		})
	if err != nil {
		t.Fatal(err)
	}
	return got
}

// TestMuxSourcesEachPatientAsAlone runs the daemon (embedded NATS, real
// sockets) with one text and one binary tcp-listen source, each carrying
// two patients of different rates interleaved and a third id no template
// admits. Every admitted stream's breath records on NATS equal those of its
// patient analysed alone, and the intruder's samples are refused and
// counted.
func TestMuxSourcesEachPatientAsAlone(t *testing.T) {
	scs := twoPatients(t)
	d, cfg, nc := startMuxDaemon(t,
		config.Source{Name: "text", URL: "tcp-listen://127.0.0.1:0?format=text", Pattern: "bed-*"},
		config.Source{Name: "binary", URL: "tcp-listen://127.0.0.1:0?format=binary", Pattern: "bed-*"})
	var mu sync.Mutex
	got := map[string][]string{} // "source/stream" → breath records
	subj := alerts.Subjects{Prefix: cfg.NATS.SubjectPrefix}
	for _, ms := range d.mux.sources {
		waitFor(t, 10*time.Second, "the listener of "+ms.cfg.Name, func() bool { return ms.src.(ingest.Listener).Addr() != "" })
	}
	for k, format := range []ingest.Format{ingest.FormatText, ingest.FormatBinary} {
		// The two sources carry the same ids: run them one after the
		// other, each with its own subscription.
		sub, err := nc.Subscribe(subj.All(alerts.KindBreath), func(m *nats.Msg) {
			mu.Lock()
			got[string(format)+"/"+m.Subject] = append(got[string(format)+"/"+m.Subject], string(m.Data))
			mu.Unlock()
		})
		if err != nil {
			t.Fatal(err)
		}
		intruder := scs[0]
		intruder.Stream = "cot-1"
		var ward bytes.Buffer
		sims := []*simulator.Sim{newSim(t, scs[0]), newSim(t, scs[1]), newSim(t, intruder)}
		if _, err := simulator.StreamWard(t.Context(), sims, simulator.WriterOutput(&ward), simulator.WardOptions{Format: format}); err != nil {
			t.Fatal(err)
		}
		want := map[string][]string{}
		for _, sc := range scs {
			want[string(format)+"/"+subj.Breath(sc.Stream)] = aloneBreaths(t, sc, format)
		}
		conn, err := net.Dial("tcp", d.mux.sources[k].src.(ingest.Listener).Addr())
		if err != nil {
			t.Fatal(err)
		}
		if _, err := conn.Write(ward.Bytes()); err != nil {
			t.Fatal(err)
		}
		conn.Close()
		waitFor(t, 20*time.Second, "every breath on NATS", func() bool {
			mu.Lock()
			defer mu.Unlock()
			for k, w := range want {
				if len(got[k]) < len(w) {
					return false
				}
			}
			return true
		})
		_ = sub.Drain()
		mu.Lock()
		for key, w := range want {
			// 90 s at 15 and 20 a minute, less the first and last.
			if len(w) < 20 || !slices.Equal(got[key], w) {
				t.Errorf("%s: %d breaths, alone %d, or not the same", key, len(got[key]), len(w))
			}
		}
		if len(got) != 2*(k+1) {
			t.Errorf("%s: breaths on %d subjects, want 2 per source", format, len(got))
		}
		mu.Unlock()
		var m dto.Metric
		if err := d.m.refused.WithLabelValues(d.mux.sources[k].cfg.Name).Write(&m); err != nil {
			t.Fatal(err)
		}
		if n := m.GetCounter().GetValue(); n < 9000 {
			t.Errorf("%s: %v samples of cot-1 refused, want its 90 s at 100 Hz", format, n)
		}
	}
	// An acknowledgement reaches the shard that owns the stream: the
	// pipeline answers that it has no such alarm (no alarm was raised).
	for _, tc := range []struct{ stream, want string }{
		{"bed-a", "bed-a/air-trapping/1"},
		{"cot-1", `no stream "cot-1"`},
	} {
		msg, err := nc.Request(subj.Ack(tc.stream), []byte(`{"id":"`+tc.stream+`/air-trapping/1","by":"x"}`), 5*time.Second)
		if err != nil {
			t.Fatalf("ack %s: %v", tc.stream, err)
		}
		var r bus.AckReply
		if err := json.Unmarshal(msg.Data, &r); err != nil || r.OK || !strings.Contains(r.Error, tc.want) {
			t.Errorf("ack %s: reply %s, want an error containing %q", tc.stream, msg.Data, tc.want)
		}
	}
}

// TestMuxFileSource: a recording of two patients as a multiplexed file
// source is read to its end without a loss (a file waits for the shards),
// each stream's breaths equal its patient's alone, and the streams finish.
func TestMuxFileSource(t *testing.T) {
	scs := twoPatients(t)
	var ward bytes.Buffer
	if _, err := simulator.StreamWard(t.Context(), []*simulator.Sim{newSim(t, scs[0]), newSim(t, scs[1])}, simulator.WriterOutput(&ward),
		simulator.WardOptions{Format: ingest.FormatText}); err != nil {
		t.Fatal(err)
	}
	path := t.TempDir() + "/ward.csv"
	if err := os.WriteFile(path, ward.Bytes(), 0o600); err != nil {
		t.Fatal(err)
	}
	cfg := config.Default()
	cfg.DataDir = t.TempDir()
	cfg.HTTP.Listen = ""
	cfg.NATS.Embedded.Port = 0
	cfg.Sources = []config.Source{{Name: "rec", URL: "file://" + path, Allow: []string{"bed-a", "bed-b"}}}
	d, _ := startDaemon(t, cfg)
	ms := d.mux.sources[0]
	waitFor(t, 20*time.Second, "the file to be read to its end", func() bool { return ms.finished.Load() })
	for _, sc := range scs {
		st := ms.stream(sc.Stream)
		want := len(aloneBreaths(t, sc, ingest.FormatText))
		waitFor(t, 10*time.Second, "the breaths of "+sc.Stream, func() bool { return st.breaths.Load() >= uint64(want) })
		if got := st.breaths.Load(); got != uint64(want) || want < 20 {
			t.Errorf("%s: %d breaths, alone %d", sc.Stream, got, want)
		}
	}
}

// startMuxDaemon runs the daemon (embedded NATS on a free port, no HTTP)
// with the multiplexed sources given, and connects a NATS client to it.
func startMuxDaemon(t *testing.T, sources ...config.Source) (*Daemon, *config.Config, *nats.Conn) {
	t.Helper()
	cfg := muxConfig(t, sources...)
	d, info := startDaemon(t, cfg)
	nc, err := nats.Connect(info.NATSURL)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	return d, cfg, nc
}

// muxConfig is the default configuration with sources, its data in a
// temporary directory, no HTTP listener and the embedded NATS server on a
// free port.
func muxConfig(t *testing.T, sources ...config.Source) *config.Config {
	t.Helper()
	cfg := config.Default()
	cfg.DataDir = t.TempDir()
	cfg.HTTP.Listen = ""
	cfg.NATS.Embedded.Port = 0
	cfg.Sources = sources
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	return cfg
}

// startDaemon runs a daemon on cfg until the test ends and returns it once
// it is ready.
func startDaemon(t *testing.T, cfg *config.Config) (*Daemon, Info) {
	t.Helper()
	r := startDaemonWith(t, cfg, Options{})
	return r.d, r.info
}

// runningDaemon is a daemon started by startDaemonWith. (Tests of other
// packages have daemontest; this package's own tests cannot import it.)
type runningDaemon struct {
	d      *Daemon
	info   Info
	cancel context.CancelFunc
	done   chan error
	err    error
	ended  bool
}

// startDaemonWith runs a daemon on cfg with opts (Ready is its own) until
// stop or the end of the test, and returns it once it is ready.
func startDaemonWith(tb testing.TB, cfg *config.Config, opts Options) *runningDaemon {
	tb.Helper()
	readyc := make(chan Info, 1)
	opts.Ready = func(i Info) { readyc <- i }
	d, err := New(cfg, zerolog.Nop(), opts)
	if err != nil {
		tb.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	r := &runningDaemon{d: d, cancel: cancel, done: make(chan error, 1)}
	go func() { r.done <- d.Run(ctx) }()
	tb.Cleanup(func() {
		if err := r.stop(); err != nil {
			tb.Errorf("daemon: %v", err)
		}
	})
	select {
	case r.info = <-readyc:
	case err := <-r.done:
		r.ended, r.err = true, err
		tb.Fatalf("Run returned before it was ready: %v", err)
	case <-time.After(30 * time.Second):
		tb.Fatal("daemon not ready within 30 s")
	}
	return r
}

// stop cancels the daemon and returns what Run returned (the same again
// when stopped twice); a daemon that does not return within 20 s is an
// error.
func (r *runningDaemon) stop() error {
	if r.ended {
		return r.err
	}
	r.cancel()
	select {
	case r.err = <-r.done:
	case <-time.After(20 * time.Second):
		r.err = errors.New("Run did not return within 20 s of cancellation")
	}
	r.ended = true
	return r.err
}
