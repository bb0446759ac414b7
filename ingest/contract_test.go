package ingest

import (
	"bytes"
	"context"
	"errors"
	"net"
	"os"
	"path/filepath"
	"runtime"
	"sync"
	"testing"
	"time"

	"github.com/creack/pty"
	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
)

// collector is a sink that keeps copies of what it receives.
type collector struct {
	mu      sync.Mutex
	samples map[string][]Sample
	status  []Event
	order   []Event // status events and sample batches (without samples) in order
}

func newCollector() *collector { return &collector{samples: map[string][]Sample{}} }

func (c *collector) sink(ev Event) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if len(ev.Samples) > 0 {
		c.samples[ev.Stream] = append(c.samples[ev.Stream], ev.Samples...)
	}
	if ev.Status != StatusNone {
		c.status = append(c.status, ev)
	}
	c.order = append(c.order, Event{Stream: ev.Stream, Status: ev.Status, GapS: ev.GapS, Err: ev.Err,
		Samples: append([]Sample(nil), ev.Samples...)})
}

// connected reports whether a StatusConnected arrived.
func (c *collector) connected() bool {
	c.mu.Lock()
	defer c.mu.Unlock()
	for _, e := range c.status {
		if e.Status == StatusConnected {
			return true
		}
	}
	return false
}

func (c *collector) count(stream string) int {
	c.mu.Lock()
	defer c.mu.Unlock()
	return len(c.samples[stream])
}

func (c *collector) get(stream string) []Sample {
	c.mu.Lock()
	defer c.mu.Unlock()
	return append([]Sample(nil), c.samples[stream]...)
}

func (c *collector) statuses() []Event {
	c.mu.Lock()
	defer c.mu.Unlock()
	return append([]Event(nil), c.status...)
}

// waitFor polls cond every 5 ms for at most d.
func waitFor(t *testing.T, d time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(d)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("waited %v for %s", d, what)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// running starts src.Run and returns a function that cancels it and checks
// that Run returned nil promptly.
func running(t *testing.T, src Source, sink Sink) (stop func(), done <-chan error) {
	t.Helper()
	ctx, cancel := context.WithCancel(t.Context())
	finished := make(chan struct{})
	var runErr error
	go func() {
		runErr = src.Run(ctx, sink)
		close(finished)
	}()
	errc := make(chan error, 1)
	go func() {
		<-finished
		errc <- runErr
	}()
	var once sync.Once
	stop = func() {
		once.Do(func() {
			cancel()
			select {
			case <-finished:
				if runErr != nil {
					t.Errorf("Run returned %v after cancellation, want nil", runErr)
				}
			case <-time.After(3 * time.Second):
				t.Errorf("Run did not return within 3 s of cancellation")
			}
		})
	}
	t.Cleanup(stop)
	return stop, errc
}

// startNATS runs an in-process server on a random loopback port.
func startNATS(t *testing.T) *nats.Conn {
	t.Helper()
	ns, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, NoSigs: true, NoLog: true})
	if err != nil {
		t.Fatal(err)
	}
	ns.Start()
	t.Cleanup(ns.Shutdown)
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("nats server not ready")
	}
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	return nc
}

// harness drives one kind of source for the contract suite.
type harness struct {
	name string
	// finite sources end Run by themselves at the end of their input.
	finite bool
	// open prepares the medium holding data and returns the source URL and
	// options; feed, when not nil, delivers data once Run has started.
	open func(t *testing.T, format Format, data []byte) (url string, opts Options, feed func(src Source, col *collector))
}

func addrOf(t *testing.T, src Source) string {
	t.Helper()
	l := src.(Listener)
	waitFor(t, 2*time.Second, "the source to listen", func() bool { return l.Addr() != "" })
	return l.Addr()
}

// writeChunks writes data in pieces that cut lines and frames anywhere.
func writeChunks(t *testing.T, w interface{ Write([]byte) (int, error) }, data []byte) {
	for len(data) > 0 {
		k := min(len(data), 1+len(data)%700)
		if _, err := w.Write(data[:k]); err != nil {
			t.Errorf("write: %v", err)
			return
		}
		data = data[k:]
	}
}

var harnesses = []harness{
	{name: "file", finite: true, open: func(t *testing.T, f Format, data []byte) (string, Options, func(Source, *collector)) {
		path := filepath.Join(t.TempDir(), "bench 2.dat")
		if err := os.WriteFile(path, data, 0o644); err != nil {
			t.Fatal(err)
		}
		return "file://" + path + "?format=" + string(f), Options{}, nil
	}},
	{name: "stdin", finite: true, open: func(t *testing.T, f Format, data []byte) (string, Options, func(Source, *collector)) {
		return "stdin?format=" + string(f), Options{Stdin: bytes.NewReader(data)}, nil
	}},
	{name: "tcp", open: func(t *testing.T, f Format, data []byte) (string, Options, func(Source, *collector)) {
		ln, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { ln.Close() })
		go func() {
			c, err := ln.Accept()
			if err != nil {
				return
			}
			defer c.Close()
			writeChunks(t, c, data)
			// Keep the connection open until the test ends.
			buf := make([]byte, 1)
			_, _ = c.Read(buf)
		}()
		return "tcp://" + ln.Addr().String() + "?format=" + string(f), Options{}, nil
	}},
	{name: "tcp-listen", open: func(t *testing.T, f Format, data []byte) (string, Options, func(Source, *collector)) {
		return "tcp-listen://127.0.0.1:0?format=" + string(f), Options{}, func(src Source, col *collector) {
			c, err := net.Dial("tcp", addrOf(t, src))
			if err != nil {
				t.Error(err)
				return
			}
			writeChunks(t, c, data)
			t.Cleanup(func() { c.Close() })
		}
	}},
	{name: "udp", open: func(t *testing.T, f Format, data []byte) (string, Options, func(Source, *collector)) {
		return "udp://127.0.0.1:0?format=" + string(f), Options{Buffer: 4096}, func(src Source, col *collector) {
			c, err := net.Dial("udp", addrOf(t, src))
			if err != nil {
				t.Error(err)
				return
			}
			defer c.Close()
			// One datagram per whole line or frame, paced so that the
			// loopback socket buffer does not overflow.
			for i, p := range splitUnits(f, data) {
				if _, err := c.Write(p); err != nil {
					t.Error(err)
					return
				}
				if i%50 == 49 {
					time.Sleep(time.Millisecond)
				}
			}
		}
	}},
	{name: "serial", open: func(t *testing.T, f Format, data []byte) (string, Options, func(Source, *collector)) {
		master, tty, err := pty.Open()
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { master.Close() })
		link := filepath.Join(t.TempDir(), "ttyBENCH0")
		if err := os.Symlink(tty.Name(), link); err != nil {
			t.Fatal(err)
		}
		return "serial://" + link + "?baud=115200&format=" + string(f), Options{}, func(src Source, col *collector) {
			// The port holds the slave once the source reports the device open.
			waitFor(t, 2*time.Second, "the serial port to open", col.connected)
			tty.Close()
			writeChunks(t, master, data)
		}
	}},
	{name: "nats", open: func(t *testing.T, f Format, data []byte) (string, Options, func(Source, *collector)) {
		nc := startNATS(t)
		// One message per line makes an event per sample: buffer them all.
		return "nats:lab.samples.*?format=" + string(f), Options{NATS: nc, Buffer: 4096}, func(src Source, col *collector) {
			// The subscription is sent before the source reports the link
			// up, on the same connection as these publishes.
			waitFor(t, 2*time.Second, "the subscription", col.connected)
			for _, p := range splitUnits(f, data) {
				if err := nc.Publish("lab.samples.bed-9", p); err != nil {
					t.Error(err)
				}
			}
			_ = nc.Flush()
		}
	}},
}

// splitUnits cuts data into whole lines (text) or whole frames (binary).
func splitUnits(f Format, data []byte) [][]byte {
	var out [][]byte
	if f == FormatText {
		for len(data) > 0 {
			i := bytes.IndexByte(data, '\n')
			if i < 0 {
				i = len(data) - 1
			}
			out = append(out, data[:i+1])
			data = data[i+1:]
		}
		return out
	}
	for len(data) > 0 {
		n, ok := frameSize(data)
		if !ok {
			return append(out, data)
		}
		out = append(out, data[:n])
		data = data[n:]
	}
	return out
}

// TestSourceContract runs every source against the same expectations: the
// samples written arrive identical and in order, bad input is counted and
// skipped, Stats agree with what the sink saw, and Run returns nil promptly
// on cancellation without leaving goroutines behind.
func TestSourceContract(t *testing.T) {
	in := testSignal(600, 100, false)
	textEnc, _ := NewTextEncoder(TextEncoderOptions{})
	binEnc, _ := NewBinaryEncoder(BinaryEncoderOptions{RateHz: 100, Time: true})
	for _, h := range harnesses {
		for _, f := range []Format{FormatText, FormatBinary} {
			t.Run(h.name+"/"+string(f), func(t *testing.T) {
				var data []byte
				stream := DefaultStream
				if f == FormatText {
					data = append(data, textEnc.Header()...)
					for i, s := range in {
						data = textEnc.Append(data, "", s)
						if i%100 == 50 {
							data = append(data, "0.5,not a number,1\n"...) // 6 bad lines
						}
					}
				} else {
					stream = "bed-9"
					for i := 0; i < len(in); i += 10 {
						data = binEnc.AppendFrame(data, stream, in[i:i+10])
					}
				}
				if h.name == "nats" && f == FormatText {
					stream = "bed-9" // the subject's last token names the stream
				}
				url, opts, feed := h.open(t, f, data)
				src, err := Open(url, opts)
				if err != nil {
					t.Fatal(err)
				}
				before := runtime.NumGoroutine()
				col := newCollector()
				stop, done := running(t, src, col.sink)
				if feed != nil {
					feed(src, col)
				}
				if h.finite {
					select {
					case err := <-done:
						if err != nil {
							t.Fatalf("Run: %v", err)
						}
					case <-time.After(10 * time.Second):
						t.Fatal("finite source did not end")
					}
				} else {
					waitFor(t, 10*time.Second, "all samples", func() bool { return col.count(stream) >= len(in) })
				}
				got := col.get(stream)
				if len(got) != len(in) {
					t.Fatalf("%d samples on %q, want %d (stats %+v)", len(got), stream, len(in), src.Stats())
				}
				for i, s := range got {
					w := in[i]
					// Text is written in shortest form, flow in L/min (one
					// rounding each way); binary in 0.001 cmH2O and 0.01 mL/s
					// steps.
					tol := 1e-12
					if f == FormatBinary {
						tol = 0.0005
					}
					if !near(s.TimeS, w.TimeS, 1e-9) || !near(s.PressureCmH2O, w.PressureCmH2O, tol) || !near(s.FlowLPS, w.FlowLPS, tol/100) {
						t.Fatalf("sample %d: %+v, want %+v", i, s, w)
					}
				}
				st := src.Stats()
				wantBad := uint64(0)
				if f == FormatText {
					wantBad = 6
				}
				if st.Samples != uint64(len(in)) || st.BadLines != wantBad || st.BadFrames != 0 || st.Gaps != 0 || st.Dropped != 0 {
					t.Errorf("stats %+v", st)
				}
				stop()
				waitFor(t, 3*time.Second, "goroutines to end", func() bool { return runtime.NumGoroutine() <= before+2 })
			})
		}
	}
}

func TestSourceErrors(t *testing.T) {
	t.Run("missing file stops Run", func(t *testing.T) {
		src, err := Open("file://"+filepath.Join(t.TempDir(), "absent.csv"), Options{})
		if err != nil {
			t.Fatal(err)
		}
		if err := src.Run(t.Context(), func(Event) {}); err == nil || !errors.Is(err, os.ErrNotExist) {
			t.Fatalf("Run: %v, want a not-exist error", err)
		}
	})
	t.Run("port in use stops Run", func(t *testing.T) {
		ln, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		defer ln.Close()
		src, _ := Open("tcp-listen://"+ln.Addr().String(), Options{})
		if err := src.Run(t.Context(), func(Event) {}); err == nil {
			t.Fatal("Run on a port in use returned nil")
		}
	})
	t.Run("nats without connection", func(t *testing.T) {
		if _, err := Open("nats:trapline.samples.x", Options{}); err == nil {
			t.Fatal("accepted")
		}
	})
	t.Run("bad columns", func(t *testing.T) {
		if _, err := Open("stdin?columns=time,pressure", Options{}); err == nil {
			t.Fatal("accepted")
		}
	})
}

// TestTCPReconnect stops the server a tcp source reads from and starts it
// again on the same port: the source reports the disconnection, reconnects
// with backoff, and the gap in the samples' times is reported.
func TestTCPReconnect(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr := ln.Addr().String()
	enc, _ := NewTextEncoder(TextEncoderOptions{})
	in := testSignal(400, 100, false)
	serve := func(ln net.Listener, part []Sample) {
		c, err := ln.Accept()
		if err != nil {
			return
		}
		b := enc.Header()
		for _, s := range part {
			b = enc.Append(b, "", s)
		}
		_, _ = c.Write(b)
		c.Close()
	}
	src, _ := Open("tcp://"+addr, Options{Stream: "bed-2", RateHz: 100, BackoffMin: 20 * time.Millisecond, BackoffMax: 200 * time.Millisecond})
	col := newCollector()
	running(t, src, col.sink)
	serve(ln, in[:150])
	ln.Close()
	waitFor(t, 5*time.Second, "the first part", func() bool { return col.count("bed-2") == 150 })
	waitFor(t, 5*time.Second, "a disconnection", func() bool {
		for _, e := range col.statuses() {
			if e.Status == StatusDisconnected {
				return true
			}
		}
		return false
	})
	ln2, err := net.Listen("tcp", addr)
	if err != nil {
		t.Fatalf("listen again on %s: %v", addr, err)
	}
	defer ln2.Close()
	serve(ln2, in[250:]) // one second of samples missing
	waitFor(t, 5*time.Second, "the second part", func() bool { return col.count("bed-2") == 300 })
	var gap float64
	for _, e := range col.statuses() {
		if e.Status == StatusGap {
			gap = e.GapS
		}
	}
	// 100 samples missing at 100 Hz: the gap is 1 s (the next sample is one
	// period after the last one, so GapS = 2.50 - 1.49 - 0.01).
	if !near(gap, 1.0, 1e-9) || src.Stats().Reconnects < 1 || src.Stats().Gaps != 1 {
		t.Fatalf("gap %v, stats %+v", gap, src.Stats())
	}
}
