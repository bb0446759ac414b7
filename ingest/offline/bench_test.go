package offline_test

import (
	"bufio"
	"bytes"
	"context"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"trapline/analyze"
	"trapline/daemon/cli"
	"trapline/ingest"
	"trapline/ingest/offline"
	"trapline/simulator"
)

// The offline benchmarks compare trapline's reading and breath analysis of
// a recording with a naive program doing comparable work, side by side in
// one run, in CPU time per sample (user and system time of the process, so
// that work on other cores counts and waiting for a busy machine does not).
//
//	go test -run '^$' -bench Offline -benchtime 3x ./ingest/offline

// recording writes a simulated recording in the sample line format v1 (4
// decimals, as `trapline sim` writes by default) into dir: one patient, or
// a ward of several interleaved, at 200 Hz.
func recording(b *testing.B, patients int, durationS float64) (string, int) {
	b.Helper()
	var scs []simulator.Scenario
	for k := range patients {
		sc := simulator.Steady{RCmH2OSPerL: 12 + 4*float64(k), CMLPerCmH2O: 45, VtML: 500, FlowLPM: 50,
			RateBPM: 15 + 2*float64(k), PEEPCmH2O: 5, SampleRateHz: 200, DurationS: durationS}.Scenario()
		scs = append(scs, sc)
	}
	path := filepath.Join(b.TempDir(), "recording.csv")
	out, err := simulator.ParseOutput(path, simulator.OutputOptions{})
	if err != nil {
		b.Fatal(err)
	}
	var st simulator.StreamStats
	if patients == 1 {
		sim, err := simulator.New(scs[0])
		if err != nil {
			b.Fatal(err)
		}
		enc, _ := ingest.NewTextEncoder(ingest.TextEncoderOptions{Decimals: 4})
		st, err = simulator.Stream(b.Context(), sim, out, simulator.StreamOptions{Encoder: enc})
		if err != nil {
			b.Fatal(err)
		}
	} else {
		if scs, err = simulator.WardScenarios(scs, patients, "bed"); err != nil {
			b.Fatal(err)
		}
		var sims []*simulator.Sim
		for _, sc := range scs {
			s, err := simulator.New(sc)
			if err != nil {
				b.Fatal(err)
			}
			sims = append(sims, s)
		}
		if st, err = simulator.StreamWard(b.Context(), sims, out, simulator.WardOptions{Decimals: 4}); err != nil {
			b.Fatal(err)
		}
	}
	return path, int(st.Samples)
}

// naiveAnalyze is the baseline: the program one writes first. It reads
// lines with bufio.Scanner, splits them with strings.Split, converts with
// strconv.ParseFloat, integrates the volume, cuts breaths where the flow
// turns inspiratory, and fits the equation of motion of the respiratory
// system P = R·V' + E·V + P0 over each breath by least squares, through
// the sums of its 3×3 normal equations on [V', V, 1] (Bates J.H.T., "Lung
// Mechanics: An Inverse Modeling Approach", Cambridge University Press,
// 2009, ch. 3). Files of one stream only. It returns the samples read, the
// breaths fitted and the sum of their resistances.
func naiveAnalyze(r io.Reader) (samples, breaths int, sumR float64) {
	sc := bufio.NewScanner(r)
	var prevT, prevF, vol float64
	var s [10]float64 // Σ f², f·v, f, v², v, 1, f·p, v·p, p; s[9] unused
	have := false
	for sc.Scan() {
		fields := strings.Split(sc.Text(), ",")
		if len(fields) < 3 {
			continue
		}
		t, err1 := strconv.ParseFloat(fields[0], 64)
		p, err2 := strconv.ParseFloat(fields[1], 64)
		q, err3 := strconv.ParseFloat(fields[2], 64)
		if err1 != nil || err2 != nil || err3 != nil {
			continue // the header, a comment
		}
		f := q / 60 // L/min → L/s
		samples++
		if have {
			vol += (f + prevF) / 2 * (t - prevT)
			if prevF <= 0 && f > 0 { // a new inspiration: fit the breath that ended
				if R, ok := solveMotion(&s); ok {
					breaths++
					sumR += R
				}
				s, vol = [10]float64{}, 0
			}
		}
		s[0] += f * f
		s[1] += f * vol
		s[2] += f
		s[3] += vol * vol
		s[4] += vol
		s[5]++
		s[6] += f * p
		s[7] += vol * p
		s[8] += p
		prevT, prevF, have = t, f, true
	}
	return samples, breaths, sumR
}

// solveMotion solves the normal equations by Cramer's rule and returns R.
func solveMotion(s *[10]float64) (float64, bool) {
	a := [3][3]float64{{s[0], s[1], s[2]}, {s[1], s[3], s[4]}, {s[2], s[4], s[5]}}
	y := [3]float64{s[6], s[7], s[8]}
	det := func(m [3][3]float64) float64 {
		return m[0][0]*(m[1][1]*m[2][2]-m[1][2]*m[2][1]) - m[0][1]*(m[1][0]*m[2][2]-m[1][2]*m[2][0]) +
			m[0][2]*(m[1][0]*m[2][1]-m[1][1]*m[2][0])
	}
	d := det(a)
	if s[5] < 10 || math.Abs(d) < 1e-12 {
		return 0, false
	}
	m := a
	for i := range 3 {
		m[i][0] = y[i]
	}
	return det(m) / d, true
}

// traplineAnalyze reads the recording through ingest/offline and runs one
// analyze.Analyzer per stream on it; it returns the samples read and the
// breaths completed.
func traplineAnalyze(b *testing.B, path string, workers int) (samples, breaths int) {
	f, err := os.Open(path)
	if err != nil {
		b.Fatal(err)
	}
	defer f.Close()
	var total atomic.Int64
	st, err := offline.Run(context.Background(), f, offline.Options{Workers: workers}, func(stream string) offline.Handler {
		a := analyze.NewAnalyzer(stream, analyze.DefaultConfig())
		return func(samples []ingest.Sample) {
			n := int64(0)
			for _, s := range samples {
				if _, ok := a.Push(s); ok {
					n++
				}
			}
			total.Add(n)
		}
	})
	if err != nil {
		b.Fatal(err)
	}
	return int(st.Samples), int(total.Load())
}

// naiveFile runs the naive baseline on the file at path and returns the
// samples read and the breaths cut.
func naiveFile(b *testing.B, path string) (samples, breaths int) {
	f, err := os.Open(path)
	if err != nil {
		b.Fatal(err)
	}
	defer f.Close()
	samples, breaths, _ = naiveAnalyze(f)
	return samples, breaths
}

// BenchmarkOfflineVsNaive reads a 1 h, 200 Hz recording of one patient
// with the naive baseline and with trapline (decoding and analysis on one
// goroutine, then on two), each iteration running all three, and reports
// CPU and wall nanoseconds per sample and trapline's CPU as a fraction of
// the baseline's.
func BenchmarkOfflineVsNaive(b *testing.B) {
	path, n := recording(b, 1, 3600)
	var naive, serial, piped measure
	var nb, sb, pb int
	for b.Loop() {
		naive.run(func() int { k, br := naiveFile(b, path); nb = br; return k })
		serial.run(func() int { k, br := traplineAnalyze(b, path, 0); sb = br; return k })
		piped.run(func() int { k, br := traplineAnalyze(b, path, 1); pb = br; return k })
	}
	if naive.samples != serial.samples || serial.samples != piped.samples || naive.samples != n*b.N {
		b.Fatalf("samples: naive %d, trapline %d and %d, written %d×%d", naive.samples, serial.samples, piped.samples, n, b.N)
	}
	// Both cut the same breaths (15 a minute for an hour, less the first
	// and last): a check that the baseline does comparable work.
	if sb != pb || nb < 890 || nb > 900 || sb < 890 || sb > 900 {
		b.Fatalf("breaths: naive %d, trapline %d and %d, want about 900", nb, sb, pb)
	}
	b.ReportMetric(naive.cpuNs(), "naive-cpu-ns/sample")
	b.ReportMetric(serial.cpuNs(), "trapline-cpu-ns/sample")
	b.ReportMetric(serial.cpuNs()/naive.cpuNs(), "cpu-ratio")
	b.ReportMetric(piped.cpuNs(), "pipelined-cpu-ns/sample")
	b.ReportMetric(piped.wallNs(), "pipelined-wall-ns/sample")
	b.ReportMetric(serial.wallNs(), "trapline-wall-ns/sample")
	b.ReportMetric(naive.wallNs(), "naive-wall-ns/sample")
	b.ReportMetric(0, "ns/op")
}

// BenchmarkAnalyzeVsNaive runs the whole `trapline analyze` verb (reading,
// the timing checks, analysis, detectors, the alarm lifecycle and the
// NDJSON output of every breath record and alert event) on a 1 h, 200 Hz
// recording of one patient, side by side with the naive baseline in each
// iteration, and reports the CPU time of both per sample and their ratio.
func BenchmarkAnalyzeVsNaive(b *testing.B) {
	path, n := recording(b, 1, 3600)
	var naive, full measure
	var nb int
	var out lineCounter
	for b.Loop() {
		naive.run(func() int { k, br := naiveFile(b, path); nb = br; return k })
		full.run(func() int {
			out = lineCounter{}
			var stderr strings.Builder
			if code := cli.Run(b.Context(), []string{"analyze", "--log-level", "error", path}, nil, &out, &stderr); code != cli.ExitOK {
				b.Fatalf("analyze: exit %d: %s", code, stderr.String())
			}
			return n
		})
	}
	// One breath record a breath (15 a minute for an hour, less the first
	// and last) and no alert event for a steady patient: a check that the
	// verb did the whole work and that the baseline does comparable work.
	if nb < 890 || nb > 900 || out.breaths < 890 || out.breaths > 900 {
		b.Fatalf("breaths: naive %d, analyze %d records, want about 900", nb, out.breaths)
	}
	b.ReportMetric(naive.cpuNs(), "naive-cpu-ns/sample")
	b.ReportMetric(full.cpuNs(), "analyze-cpu-ns/sample")
	b.ReportMetric(full.cpuNs()/naive.cpuNs(), "cpu-ratio")
	b.ReportMetric(full.wallNs(), "analyze-wall-ns/sample")
	b.ReportMetric(naive.wallNs(), "naive-wall-ns/sample")
	b.ReportMetric(0, "ns/op")
}

// lineCounter is the standard output of the analyze verb in
// BenchmarkAnalyzeVsNaive: it counts the breath records written.
type lineCounter struct{ breaths int }

func (w *lineCounter) Write(p []byte) (int, error) {
	w.breaths += bytes.Count(p, []byte(`{"type":"breath"`))
	return len(p), nil
}

// BenchmarkOfflineStreams reads a recording of four patients interleaved
// (15 min each at 200 Hz) on one goroutine and with two workers, which
// take two streams each.
func BenchmarkOfflineStreams(b *testing.B) {
	path, n := recording(b, 4, 900)
	var serial, parallel measure
	for b.Loop() {
		serial.run(func() int { k, _ := traplineAnalyze(b, path, 0); return k })
		parallel.run(func() int { k, _ := traplineAnalyze(b, path, 2); return k })
	}
	if serial.samples != n*b.N || parallel.samples != n*b.N {
		b.Fatalf("samples %d and %d, written %d×%d", serial.samples, parallel.samples, n, b.N)
	}
	b.ReportMetric(serial.cpuNs(), "serial-cpu-ns/sample")
	b.ReportMetric(serial.wallNs(), "serial-wall-ns/sample")
	b.ReportMetric(parallel.cpuNs(), "2-workers-cpu-ns/sample")
	b.ReportMetric(parallel.wallNs(), "2-workers-wall-ns/sample")
	b.ReportMetric(0, "ns/op")
}

// measure accumulates the CPU and wall time of one variant.
type measure struct {
	cpu, wall time.Duration
	samples   int
}

func (m *measure) run(f func() int) {
	c0, w0 := processCPU(), time.Now()
	m.samples += f()
	m.cpu += processCPU() - c0
	m.wall += time.Since(w0)
}

func (m *measure) cpuNs() float64  { return float64(m.cpu.Nanoseconds()) / float64(m.samples) }
func (m *measure) wallNs() float64 { return float64(m.wall.Nanoseconds()) / float64(m.samples) }
