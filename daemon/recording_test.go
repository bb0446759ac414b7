package daemon

import (
	"context"
	"encoding/json"
	"os"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"trapline/alerts"
	"trapline/config"
	"trapline/ingest"
	"trapline/ingest/record"
	"trapline/internal/freeport"
	"trapline/simulator"
)

// fullDisk creates segment files whose every write fails with ENOSPC, as
// on a file system that filled up after the start (the index is written).
func fullDisk(path string) (record.File, error) {
	f, err := os.OpenFile(path, os.O_CREATE|os.O_EXCL|os.O_WRONLY, 0o640)
	if err != nil || !strings.HasSuffix(path, record.SegmentExt) {
		return f, err
	}
	return noSpace{f}, nil
}

type noSpace struct{ *os.File }

func (f noSpace) Write([]byte) (int, error) {
	return 0, &os.PathError{Op: "write", Path: f.Name(), Err: syscall.ENOSPC}
}

// TestRecordingFullDiskRaisesTechnicalAlert runs the daemon with the
// recording on a disk that is full: the stream raises recording-impaired
// on NATS, keeps publishing breath records, and /metrics counts the
// dropped reads.
func TestRecordingFullDiskRaisesTechnicalAlert(t *testing.T) {
	port := freeport.Take(t)
	cfg := config.Default()
	cfg.DataDir = t.TempDir()
	cfg.NATS.Embedded.Port = 0
	cfg.HTTP.Listen = ""
	cfg.Recording.Enabled = true
	cfg.Streams = []config.Stream{{ID: "bed-1", Source: "tcp-listen://127.0.0.1:" + strconv.Itoa(port)}}
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	r := startDaemonWith(t, cfg, Options{TickEvery: 50 * time.Millisecond, RecordFile: fullDisk})
	d := r.d
	nc, err := nats.Connect(r.info.NATSURL)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	var mu sync.Mutex
	var impaired []alerts.Event
	subj := alerts.Subjects{Prefix: cfg.NATS.SubjectPrefix}
	if _, err := nc.Subscribe(subj.All(alerts.KindAlert), func(m *nats.Msg) {
		var e alerts.Event
		if json.Unmarshal(m.Data, &e) == nil && e.Condition == CondRecordingImpaired {
			mu.Lock()
			impaired = append(impaired, e)
			mu.Unlock()
		}
	}); err != nil {
		t.Fatal(err)
	}

	if err := nc.Flush(); err != nil { // the subscriptions are in place on the server
		t.Fatal(err)
	}
	// A patient at 10× real time over TCP for the length of the test.
	simCtx, stopSim := context.WithCancel(t.Context())
	defer stopSim()
	go func() {
		sc, _ := simulator.Shipped("hyperinflation")
		sim, err := simulator.New(sc)
		if err != nil {
			return
		}
		out, _ := simulator.ParseOutput("tcp://127.0.0.1:"+strconv.Itoa(port), simulator.OutputOptions{})
		enc, _ := ingest.NewTextEncoder(ingest.TextEncoderOptions{Decimals: 4})
		_, _ = simulator.Stream(simCtx, sim, out, simulator.StreamOptions{Encoder: enc, Speed: 10})
	}()

	waitFor(t, 20*time.Second, "a recording-impaired alert", func() bool {
		mu.Lock()
		defer mu.Unlock()
		return len(impaired) > 0
	})
	mu.Lock()
	e := impaired[0]
	mu.Unlock()
	if e.State != alerts.Raised || e.Class != "technical" || !strings.Contains(e.Message, "no space left") {
		t.Errorf("first recording alert: %+v", e)
	}
	if e.TraplineVersion == "" || len(e.ConfigDigest) != config.DigestLen {
		t.Errorf("alert without provenance: version %q digest %q", e.TraplineVersion, e.ConfigDigest)
	}
	// Analysis goes on after the alert.
	before := d.streams[0].breaths.Load()
	waitFor(t, 20*time.Second, "more breaths after the alert", func() bool { return d.streams[0].breaths.Load() >= before+3 })
	if st := d.rec.w.Stats(); !st.Degraded || st.DroppedRecords == 0 {
		t.Errorf("recorder stats %+v: want degraded with drops", st)
	}
	if err := r.stop(); err != nil {
		t.Errorf("Run: %v", err)
	}
}

// TestRecordingRetentionInTheDaemon leaves the segments of an earlier run
// in the recording directory and starts the daemon with recording.max_age
// or recording.max_bytes: the daemon's writer adopts them and deletes what
// the configured limit no longer allows.
func TestRecordingRetentionInTheDaemon(t *testing.T) {
	for _, tc := range []struct {
		name  string
		limit func(*config.Recording)
		check func(st record.Stats) bool
	}{
		{"age", func(r *config.Recording) { r.MaxAge, r.MaxBytes = time.Minute, 0 },
			func(st record.Stats) bool { return st.Segments == 0 }},
		{"bytes", func(r *config.Recording) { r.MaxAge, r.MaxBytes = 0, config.MiB },
			func(st record.Stats) bool { return st.DiskBytes <= int64(config.MiB) }},
	} {
		t.Run(tc.name, func(t *testing.T) {
			cfg := config.Default()
			cfg.DataDir = t.TempDir()
			cfg.NATS.Embedded.Port = 0
			cfg.HTTP.Listen = ""
			cfg.Recording.Enabled = true
			tc.limit(&cfg.Recording)
			cfg.Streams = []config.Stream{{ID: "bed-1", Source: "tcp-listen://127.0.0.1:0"}}
			if err := cfg.Validate(); err != nil {
				t.Fatal(err)
			}
			// An earlier run, two hours ago: 8 one-minute segments of 256 KiB.
			then := time.Now().Add(-2 * time.Hour)
			old, err := record.Open(t.Context(), record.Options{Dir: cfg.RecordingDir(), SegmentLength: time.Minute,
				Now: func() time.Time { return then }})
			if err != nil {
				t.Fatal(err)
			}
			src := record.Source{Stream: "bed-1", Format: ingest.FormatText}
			chunk := []byte(strings.Repeat("0.010,5.0,0.0\n", 256<<10/14))
			for i := 0; i < 8; i++ {
				old.Write(src, chunk)
				waitFor(t, 5*time.Second, "the chunk on disk", func() bool { return old.Stats().Records == uint64(i+1) })
				then = then.Add(time.Minute)
			}
			if err := old.Close(); err != nil {
				t.Fatal(err)
			}

			r := startDaemonWith(t, cfg, Options{})
			d := r.d
			waitFor(t, 20*time.Second, "the recorder", func() bool { return d.recStats() != nil })
			waitFor(t, 20*time.Second, "retention", func() bool {
				st := d.recStats()
				return st.Deleted > 0 && tc.check(*st)
			})
			if err := r.stop(); err != nil {
				t.Fatalf("daemon: %v", err)
			}
		})
	}
}
