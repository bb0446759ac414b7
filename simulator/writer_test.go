package simulator

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"net"
	"path/filepath"
	"runtime"
	"strings"
	"sync"
	"testing"
	"time"

	"go.bug.st/serial"

	"trapline/ingest"
	"trapline/internal/freeport"
)

func textEncoder(t testing.TB) ingest.Encoder {
	t.Helper()
	// Decimals 0 writes the shortest text that reads back to the same
	// float64, so a round trip must give identical samples.
	enc, err := ingest.NewTextEncoder(ingest.TextEncoderOptions{})
	if err != nil {
		t.Fatal(err)
	}
	return enc
}

func binaryEncoder(t testing.TB, hz float64) ingest.Encoder {
	t.Helper()
	enc, err := ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: hz, Time: true})
	if err != nil {
		t.Fatal(err)
	}
	return enc
}

// shortNoisy is the shipped noisy scenario cut to its first 2.5 minutes,
// which include the first artifact burst.
func shortNoisy(t testing.TB) Scenario {
	t.Helper()
	sc, err := Shipped("noisy")
	if err != nil {
		t.Fatal(err)
	}
	sc.DurationS = 150
	return sc
}

func streamBytes(t *testing.T, sc Scenario, enc ingest.Encoder) ([]byte, []byte) {
	t.Helper()
	sim, err := New(sc)
	if err != nil {
		t.Fatal(err)
	}
	var out, truth bytes.Buffer
	if _, err := Stream(t.Context(), sim, &writerOutput{w: &out}, StreamOptions{Encoder: enc, Truth: &truth}); err != nil {
		t.Fatal(err)
	}
	return out.Bytes(), truth.Bytes()
}

// TestSameSeedSameBytes: the sensor draws from a PCG generator seeded by
// the scenario, so the same seed gives the same bytes and another seed
// different ones.
func TestSameSeedSameBytes(t *testing.T) {
	for _, format := range []string{"text", "binary"} {
		t.Run(format, func(t *testing.T) {
			enc := func() ingest.Encoder {
				if format == "text" {
					return textEncoder(t)
				}
				return binaryEncoder(t, 100)
			}
			sc := shortNoisy(t)
			a, ta := streamBytes(t, sc, enc())
			b, tb := streamBytes(t, sc, enc())
			if !bytes.Equal(a, b) || !bytes.Equal(ta, tb) {
				t.Fatal("same seed gave different bytes")
			}
			if len(a) < 10000 || len(ta) < 1000 {
				t.Fatalf("only %d sample bytes and %d truth bytes", len(a), len(ta))
			}
			sc.Seed++
			c, _ := streamBytes(t, sc, enc())
			if bytes.Equal(a, c) {
				t.Fatal("another seed gave the same bytes")
			}
		})
	}
}

// decodeAll decodes text or binary bytes with the ingest decoders.
func decodeAll(t *testing.T, format ingest.Format, data []byte) []ingest.Sample {
	t.Helper()
	var got []ingest.Sample
	dec, err := ingest.NewDecoder(format, ingest.DecoderOptions{RateHz: 100}, func(_ string, s ingest.Sample) { got = append(got, s) })
	if err != nil {
		t.Fatal(err)
	}
	if err := ingest.Decode(bytes.NewReader(data), dec); err != nil {
		t.Fatal(err)
	}
	if st := dec.Stats(); st.BadLines+st.BadFrames > 0 {
		t.Errorf("decoder rejected input: %+v", st)
	}
	return got
}

// TestTextRoundTrip: what Stream writes, the ingest decoder reads back as
// the samples the simulator produced, bit for bit.
func TestTextRoundTrip(t *testing.T) {
	sc := shortNoisy(t)
	want, _, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	data, _ := streamBytes(t, sc, textEncoder(t))
	if !strings.HasPrefix(string(data), "time[s],pressure[cmH2O],flow[L/min]\n") {
		t.Fatalf("no header: %q", data[:40])
	}
	got := decodeAll(t, ingest.FormatText, data)
	compareSamples(t, got, want, 0)
}

// compareSamples checks two sample slices equal within tol (exact at 0).
func compareSamples(t *testing.T, got, want []ingest.Sample, tol float64) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%d samples, want %d", len(got), len(want))
	}
	for i := range got {
		g, w := got[i], want[i]
		if d := max(abs(g.TimeS-w.TimeS), abs(g.PressureCmH2O-w.PressureCmH2O), abs(g.FlowLPS-w.FlowLPS)); d > tol {
			t.Fatalf("sample %d: %+v, want %+v", i, g, w)
		}
	}
}

func abs(x float64) float64 {
	if x < 0 {
		return -x
	}
	return x
}

// disconnectScenario is a short steady patient with one scripted
// disconnection.
func disconnectScenario() Scenario {
	sc := Steady{RCmH2OSPerL: 20, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 20, PEEPCmH2O: 5,
		DurationS: 30, PressureNoiseCmH2O: 0.2, FlowNoiseLPM: 0.5, Seed: 11}.Scenario()
	sc.Timeline = []Step{{AtS: 12, Event: EventDisconnect, DurationS: 4}}
	return sc
}

// TestPTYRoundTrip streams a scenario with a disconnection into a pseudo
// terminal and reads it with go.bug.st/serial on the stable link, as the
// daemon reads a serial adapter: the reader sees the port close at the
// disconnection, reopens the link, and in the end has read exactly the
// samples the simulator produced.
func TestPTYRoundTrip(t *testing.T) {
	for _, format := range []ingest.Format{ingest.FormatText, ingest.FormatBinary} {
		t.Run(string(format), func(t *testing.T) {
			sc := disconnectScenario()
			want, _, err := Run(sc)
			if err != nil {
				t.Fatal(err)
			}
			link := filepath.Join(t.TempDir(), "ventilator")
			out, err := ParseOutput("pty", OutputOptions{Link: link})
			if err != nil {
				t.Fatal(err)
			}
			sim, err := New(sc)
			if err != nil {
				t.Fatal(err)
			}
			enc := textEncoder(t)
			if format == ingest.FormatBinary {
				enc = binaryEncoder(t, sc.SampleRateHz)
			}
			ctx, cancel := context.WithTimeout(t.Context(), 20*time.Second)
			defer cancel()
			streamErr := make(chan error, 1)
			go func() {
				_, err := Stream(ctx, sim, out, StreamOptions{Encoder: enc})
				streamErr <- err
			}()

			var got []ingest.Sample
			dec, err := ingest.NewDecoder(format, ingest.DecoderOptions{RateHz: sc.SampleRateHz}, func(_ string, s ingest.Sample) { got = append(got, s) })
			if err != nil {
				t.Fatal(err)
			}
			closes := 0
			buf := make([]byte, 4096)
			for len(got) < len(want) && ctx.Err() == nil {
				port, err := serial.Open(link, &serial.Mode{BaudRate: 115200})
				if err != nil {
					time.Sleep(5 * time.Millisecond) // the link is not there yet
					continue
				}
				_ = port.SetReadTimeout(50 * time.Millisecond)
				for len(got) < len(want) {
					n, err := port.Read(buf)
					if err != nil {
						closes++ // the master closed: a pulled cable
						break
					}
					_, _ = dec.Write(buf[:n])
				}
				port.Close()
			}
			if err := <-streamErr; err != nil {
				t.Fatalf("stream: %v", err)
			}
			tol := 0.0
			if format == ingest.FormatBinary {
				tol = 1e-3 // fixed point: 0.001 cmH2O, 0.01 mL/s
			}
			compareSamples(t, got, want, tol)
			if closes < 1 {
				t.Errorf("the reader never saw the disconnection")
			}
		})
	}
}

// readFirstClient accepts one client of ln and returns all it sent until
// it closed (at most 10 s); nil when none connected.
func readFirstClient(ln net.Listener) []byte {
	c, err := ln.Accept()
	if err != nil {
		return nil
	}
	defer c.Close()
	_ = c.SetReadDeadline(time.Now().Add(10 * time.Second))
	var b bytes.Buffer
	_, _ = b.ReadFrom(c)
	return b.Bytes()
}

// TestNetworkOutputs streams over real loopback sockets: to a TCP reader,
// from a TCP listener, and as UDP datagrams of whole lines.
func TestNetworkOutputs(t *testing.T) {
	sc := Steady{RCmH2OSPerL: 15, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 15, PEEPCmH2O: 5, DurationS: 20}.Scenario()
	want, _, err := Run(sc)
	if err != nil {
		t.Fatal(err)
	}
	run := func(t *testing.T, spec string, status func(string)) error {
		out, err := ParseOutput(spec, OutputOptions{OnStatus: status})
		if err != nil {
			t.Fatal(err)
		}
		sim, err := New(sc)
		if err != nil {
			t.Fatal(err)
		}
		ctx, cancel := context.WithTimeout(t.Context(), 10*time.Second)
		defer cancel()
		_, err = Stream(ctx, sim, out, StreamOptions{Encoder: textEncoder(t)})
		return err
	}
	t.Run("tcp", func(t *testing.T) {
		ln, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		defer ln.Close()
		data := make(chan []byte, 1)
		go func() { data <- readFirstClient(ln) }()
		if err := run(t, "tcp://"+ln.Addr().String(), nil); err != nil {
			t.Fatal(err)
		}
		compareSamples(t, decodeAll(t, ingest.FormatText, <-data), want, 0)
	})
	// A reader that starts listening after the simulator (both launched by
	// one script) still gets every sample: Open waits for it.
	t.Run("tcp reader starts late", func(t *testing.T) {
		addr := fmt.Sprintf("127.0.0.1:%d", freeport.Take(t))
		waiting := make(chan struct{})
		var once sync.Once
		data := make(chan []byte, 1)
		go func() {
			<-waiting // the first attempt was refused
			ln, err := net.Listen("tcp", addr)
			if err != nil {
				data <- nil
				return
			}
			defer ln.Close()
			data <- readFirstClient(ln)
		}()
		err = run(t, "tcp://"+addr, func(s string) {
			if strings.HasPrefix(s, "waiting for a reader") {
				once.Do(func() { close(waiting) })
			}
		})
		if err != nil {
			t.Fatal(err)
		}
		select {
		case <-waiting:
		default:
			t.Fatal("the first connection was not refused; the test proves nothing")
		}
		compareSamples(t, decodeAll(t, ingest.FormatText, <-data), want, 0)
	})
	t.Run("tcp-listen", func(t *testing.T) {
		addr := make(chan string, 1)
		data := make(chan []byte, 1)
		go func() {
			a, ok := <-addr
			if !ok {
				data <- nil
				return
			}
			c, err := net.Dial("tcp", a)
			if err != nil {
				data <- nil
				return
			}
			defer c.Close()
			_ = c.SetReadDeadline(time.Now().Add(10 * time.Second))
			var b bytes.Buffer
			_, _ = b.ReadFrom(c)
			data <- b.Bytes()
		}()
		var once sync.Once
		err := run(t, "tcp-listen://127.0.0.1:0", func(s string) {
			if a, ok := strings.CutPrefix(s, "listening on "); ok {
				once.Do(func() { addr <- a })
			}
		})
		if err != nil {
			t.Fatal(err)
		}
		compareSamples(t, decodeAll(t, ingest.FormatText, <-data), want, 0)
	})
	t.Run("udp", func(t *testing.T) {
		pc, err := net.ListenPacket("udp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		defer pc.Close()
		_ = pc.(*net.UDPConn).SetReadBuffer(4 << 20)
		if err := run(t, "udp://"+pc.LocalAddr().String(), nil); err != nil {
			t.Fatal(err)
		}
		var all []byte
		buf := make([]byte, 65536)
		for {
			_ = pc.SetReadDeadline(time.Now().Add(200 * time.Millisecond))
			n, _, err := pc.ReadFrom(buf)
			if err != nil {
				break
			}
			if n > maxDatagram || buf[n-1] != '\n' {
				t.Fatalf("datagram of %d bytes not made of whole lines", n)
			}
			all = append(all, buf[:n]...)
		}
		compareSamples(t, decodeAll(t, ingest.FormatText, all), want, 0)
	})
}

// TestStreamCancel: a real-time stream stops promptly when its context is
// cancelled and leaves no goroutine behind.
func TestStreamCancel(t *testing.T) {
	before := runtime.NumGoroutine()
	sim, err := New(Steady{RCmH2OSPerL: 15, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 15, PEEPCmH2O: 5, DurationS: 3600}.Scenario())
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(t.Context())
	var out syncBuffer
	done := make(chan error, 1)
	go func() {
		_, err := Stream(ctx, sim, &writerOutput{w: &out}, StreamOptions{Encoder: textEncoder(t), Speed: 1})
		done <- err
	}()
	deadline := time.Now().Add(5 * time.Second)
	for out.Len() < 100 && time.Now().Before(deadline) {
		time.Sleep(5 * time.Millisecond)
	}
	cancel()
	select {
	case err := <-done:
		if !errors.Is(err, context.Canceled) {
			t.Fatalf("Stream returned %v, want context.Canceled", err)
		}
	case <-time.After(2 * time.Second):
		t.Fatal("Stream did not return after cancellation")
	}
	for i := 0; runtime.NumGoroutine() > before && i < 100; i++ {
		time.Sleep(10 * time.Millisecond)
	}
	if n := runtime.NumGoroutine(); n > before {
		t.Errorf("%d goroutines left, %d before", n, before)
	}
	// Real time: at most a few seconds of a 100 Hz signal were written.
	lines := bytes.Count(out.Bytes(), []byte("\n"))
	if lines > 2000 {
		t.Errorf("%d lines written in real time before cancellation", lines)
	}
}

// TestPacing: at --speed 20 a 2-second scenario takes at least about
// 100 ms of wall time (a lower bound only, so a busy machine cannot fail
// it).
func TestPacing(t *testing.T) {
	sim, err := New(Steady{RCmH2OSPerL: 15, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 15, PEEPCmH2O: 5, DurationS: 2}.Scenario())
	if err != nil {
		t.Fatal(err)
	}
	start := time.Now()
	var out bytes.Buffer
	if _, err := Stream(t.Context(), sim, &writerOutput{w: &out}, StreamOptions{Encoder: textEncoder(t), Speed: 20}); err != nil {
		t.Fatal(err)
	}
	if d := time.Since(start); d < 80*time.Millisecond {
		t.Errorf("2 s at speed 20 took %v, want about 100 ms", d)
	}
	if n := len(strings.Split(strings.TrimSpace(out.String()), "\n")); n != 201 {
		t.Errorf("%d lines, want header + 200", n)
	}
}

// syncBuffer is a bytes.Buffer safe for one writer and one reader.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) Len() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Len()
}

func (s *syncBuffer) Bytes() []byte {
	s.mu.Lock()
	defer s.mu.Unlock()
	return append([]byte(nil), s.b.Bytes()...)
}

// TestStreamColumn: with StreamColumn a text writer names its stream in a
// column, so two writers appended to one link read back as two streams;
// without it they fall into the reader's default stream.
func TestStreamColumn(t *testing.T) {
	for _, column := range []bool{false, true} {
		var out bytes.Buffer
		for _, id := range []string{"bed-a", "bed-b"} {
			sc := Steady{RCmH2OSPerL: 10, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 15, PEEPCmH2O: 5,
				SampleRateHz: 100, DurationS: 20}.Scenario()
			sc.Stream = id
			sim, err := New(sc)
			if err != nil {
				t.Fatal(err)
			}
			_, err = Stream(t.Context(), sim, &writerOutput{w: &out}, StreamOptions{Encoder: textEncoder(t), StreamColumn: column})
			if err != nil {
				t.Fatal(err)
			}
		}
		count := map[string]int{}
		dec, _ := ingest.NewTextDecoder(ingest.DecoderOptions{}, func(id string, _ ingest.Sample) { count[id]++ })
		if err := ingest.Decode(bytes.NewReader(out.Bytes()), dec); err != nil {
			t.Fatal(err)
		}
		if column {
			if !strings.HasPrefix(out.String(), "stream,time[s],") || count["bed-a"] != 2000 || count["bed-b"] != 2000 || len(count) != 2 {
				t.Errorf("with the column: %q..., streams %v", out.String()[:20], count)
			}
		} else if len(count) != 1 || count[ingest.DefaultStream] != 4000 {
			t.Errorf("without the column: streams %v", count)
		}
	}
}
