package input_test

import (
	"bytes"
	"context"
	"math"
	"os"
	"path/filepath"
	"testing"
	"time"

	"trapline/ingest"
	"trapline/ingest/input"
	"trapline/ingest/record"
	"trapline/simulator"
)

// simulate writes the shipped "stable" patient to a file through enc, as
// `trapline sim --format` does.
func simulate(t *testing.T, path string, enc func(rateHz float64) (ingest.Encoder, error)) {
	t.Helper()
	sc, err := simulator.LoadScenario("stable")
	if err != nil {
		t.Fatal(err)
	}
	sim, err := simulator.New(sc)
	if err != nil {
		t.Fatal(err)
	}
	e, err := enc(sc.SampleRateHz)
	if err != nil {
		t.Fatal(err)
	}
	out, err := simulator.ParseOutput(path, simulator.OutputOptions{})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if _, err := simulator.Stream(ctx, sim, out, simulator.StreamOptions{Encoder: e, Speed: 0}); err != nil {
		t.Fatal(err)
	}
}

type tagged struct {
	stream string
	s      ingest.Sample
}

func readAll(t *testing.T, path string, opts input.Options) ([]tagged, input.Stats) {
	t.Helper()
	in, err := input.Open(path, opts)
	if err != nil {
		t.Fatal(err)
	}
	defer in.Close()
	var out []tagged
	st, err := in.Run(context.Background(), func(stream string, s ingest.Sample) { out = append(out, tagged{stream, s}) })
	if err != nil {
		t.Fatal(err)
	}
	return out, st
}

// TestBinaryEqualsText reads the same simulated patient written in text
// and in the binary framing, detected without a --format, and finds the
// same samples within the binary fixed-point resolution.
func TestBinaryEqualsText(t *testing.T) {
	dir := t.TempDir()
	textPath, binPath := filepath.Join(dir, "p.csv"), filepath.Join(dir, "p.bin")
	simulate(t, textPath, func(float64) (ingest.Encoder, error) {
		return ingest.NewTextEncoder(ingest.TextEncoderOptions{})
	})
	simulate(t, binPath, func(rate float64) (ingest.Encoder, error) {
		return ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: rate, Time: true})
	})
	var calls int
	var last, total int64
	// The text has no stream column; the frames name the simulated stream.
	text, ts := readAll(t, textPath, input.Options{Decoder: ingest.DecoderOptions{Stream: "bench-3"}})
	bin, bs := readAll(t, binPath, input.Options{Progress: func(d, tot int64) { calls++; last, total = d, tot }})
	if ts.Kind != input.KindText || bs.Kind != input.KindBinary {
		t.Fatalf("detected %s and %s, want text and binary", ts.Kind, bs.Kind)
	}
	fi, _ := os.Stat(binPath)
	if calls == 0 || last != fi.Size() || total != fi.Size() {
		t.Errorf("progress ended at %d of %d after %d calls, want %d of %d", last, total, calls, fi.Size(), fi.Size())
	}
	if len(text) < 1000 || len(text) != len(bin) {
		t.Fatalf("%d text samples, %d binary samples", len(text), len(bin))
	}
	// Half a step of ingest.DefaultScale (docs/framing.md): 0.001 cmH2O,
	// 1e-5 L/s and 1 µs, plus float64 rounding of the sample times.
	const dP, dF, dT = 0.0005 + 1e-9, 0.000005 + 1e-12, 0.0000005 + 1e-9
	for i := range text {
		a, b := text[i], bin[i]
		if a.stream != b.stream || math.Abs(a.s.TimeS-b.s.TimeS) > dT ||
			math.Abs(a.s.PressureCmH2O-b.s.PressureCmH2O) > dP || math.Abs(a.s.FlowLPS-b.s.FlowLPS) > dF {
			t.Fatalf("sample %d: text %+v, binary %+v", i, a, b)
		}
	}
}

// TestKinds opens each kind of input, detected and forced, and refuses
// what cannot be read with a message that says what was expected.
func TestKinds(t *testing.T) {
	dir := t.TempDir()
	csv := filepath.Join(dir, "a.csv")
	_ = os.WriteFile(csv, []byte("time[s],pressure[cmH2O],flow[L/min],stream\n0,5,0,x\n0.01,6,1,y\n"), 0o600)
	rec := filepath.Join(dir, "rec")
	w, err := record.Open(context.Background(), record.Options{Dir: rec})
	if err != nil {
		t.Fatal(err)
	}
	w.Write(record.Source{Stream: "bed-1", Format: ingest.FormatText}, []byte("0,5,0\n0.01,6,1\n0.02,7,2\n"))
	_ = w.Close()
	got, st := readAll(t, rec, input.Options{})
	if st.Kind != input.KindRecording || len(got) != 3 || got[2].stream != "bed-1" || got[2].s.PressureCmH2O != 7 {
		t.Errorf("recording: kind %s, samples %+v", st.Kind, got)
	}
	got, _ = readAll(t, "-", input.Options{Stdin: bytes.NewReader([]byte("0,5,0\n"))})
	if len(got) != 1 || got[0].stream != ingest.DefaultStream {
		t.Errorf("stdin: %+v", got)
	}
	got, _ = readAll(t, csv, input.Options{Kind: input.KindText})
	if len(got) != 2 || got[0].stream != "x" || got[1].stream != "y" {
		t.Errorf("stream column: %+v", got)
	}
	for _, tc := range []struct {
		path string
		opts input.Options
	}{
		{csv, input.Options{Kind: input.KindRecording}},
		{rec, input.Options{Kind: input.KindText}},
		{dir + "/missing", input.Options{}},
		{t.TempDir(), input.Options{}},
	} {
		if _, err := input.Open(tc.path, tc.opts); err == nil {
			t.Errorf("%s as %q: no error", tc.path, tc.opts.Kind)
		}
	}
	in, err := input.Open(csv, input.Options{Kind: input.KindBinary})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := in.Run(context.Background(), func(string, ingest.Sample) {}); err == nil {
		t.Error("text read as binary gave no error")
	}
	if _, err := input.ParseKind("csv"); err == nil {
		t.Error("ParseKind accepted csv")
	}
}
