package ingest

import (
	"errors"
	"fmt"
	"math/rand/v2"
	"slices"
	"testing"
)

// interleaved encodes n samples of each of the streams, taking the
// streams in a random order at every step as a link shared by several
// senders does, and returns the bytes with, per stream, the samples sent.
func interleaved(t testing.TB, enc Encoder, streams []string, n int, seed uint64) ([]byte, map[string][]Sample) {
	t.Helper()
	r := rand.New(rand.NewPCG(seed, 7))
	sig := testSignal(n, 100, false)
	next := make([]int, len(streams))
	sent := map[string][]Sample{}
	buf := append([]byte(nil), enc.Header()...)
	for left := n * len(streams); left > 0; left-- {
		k := r.IntN(len(streams))
		for next[k] == n {
			k = (k + 1) % len(streams)
		}
		s := sig[next[k]]
		s.PressureCmH2O += float64(k) // tell the streams apart
		next[k]++
		buf = enc.Append(buf, streams[k], s)
		sent[streams[k]] = append(sent[streams[k]], s)
	}
	return buf, sent
}

// TestBatchDemux: a text and a binary link carrying three interleaved
// streams, decoded in pieces into batches and split by a Demux, give each
// stream exactly the samples its sender wrote, in order, and every span
// names its stream by the batch's ids.
func TestBatchDemux(t *testing.T) {
	streams := []string{"bed-a", "bed-b", "bed-c"}
	text, _ := NewTextEncoder(TextEncoderOptions{Stream: true})
	bin, _ := NewBinaryEncoder(BinaryEncoderOptions{RateHz: 100, Time: true})
	for _, tc := range []struct {
		name   string
		format Format
		enc    Encoder
	}{{"text", FormatText, text}, {"binary", FormatBinary, bin}} {
		t.Run(tc.name, func(t *testing.T) {
			in, sent := interleaved(t, tc.enc, streams, 3000, 1)
			d, err := NewBatchDecoder(tc.format, DecoderOptions{})
			if err != nil {
				t.Fatal(err)
			}
			var b Batch
			var m Demux
			got := map[string][]Sample{}
			for p := in; len(p) > 0; {
				k := min(len(p), 1000+len(p)%777)
				b.Reset()
				d.Decode(&b, p[:k])
				p = p[k:]
				if len(b.Samples) != len(b.Streams) {
					t.Fatalf("%d samples, %d stream indexes", len(b.Samples), len(b.Streams))
				}
				for _, sp := range m.Split(&b) {
					if b.IDs[sp.Index] != sp.Stream {
						t.Fatalf("span index %d names %q, ids say %q", sp.Index, sp.Stream, b.IDs[sp.Index])
					}
					got[sp.Stream] = append(got[sp.Stream], sp.Samples...)
				}
			}
			b.Reset()
			d.Flush(&b)
			if b.Len() != 0 || d.Stats().BadLines+d.Stats().BadFrames != 0 {
				t.Fatalf("left %d samples, stats %+v", b.Len(), d.Stats())
			}
			if !slices.Equal(slices.Sorted(slices.Values(d.IDs())), streams) {
				t.Fatalf("ids %v, want %v", d.IDs(), streams)
			}
			// Binary is fixed point and text flow goes through L/min: 1e-3
			// is far below the 1 cmH2O that tells the streams apart.
			same := func(a, b Sample) bool {
				return near(a.TimeS, b.TimeS, 1e-3) && near(a.PressureCmH2O, b.PressureCmH2O, 1e-3) && near(a.FlowLPS, b.FlowLPS, 1e-3)
			}
			for _, id := range streams {
				if !slices.EqualFunc(got[id], sent[id], same) {
					t.Errorf("stream %s: %d samples back of %d sent, or not the same", id, len(got[id]), len(sent[id]))
				}
			}
		})
	}
}

// TestDemuxNoCopy: a batch whose streams come in one run each is split
// into spans over the batch itself; an interleaved one is grouped stably.
// The reference grouping is the obvious one: append each sample to its
// stream's list.
func TestDemuxNoCopy(t *testing.T) {
	ids := []string{"a", "b", "c"}
	mk := func(streams ...int32) *Batch {
		b := &Batch{IDs: ids}
		for i, x := range streams {
			b.add(x, Sample{TimeS: float64(i)})
		}
		return b
	}
	var m Demux
	for _, streams := range [][]int32{{0, 0, 0}, {2, 2, 0, 0, 0, 1}, {0, 1, 0, 2, 1, 1, 0}, {1}, {}} {
		b := mk(streams...)
		want := map[int32][]Sample{}
		var order []int32
		runs := 0
		for i, x := range streams {
			if _, ok := want[x]; !ok {
				order = append(order, x)
			}
			want[x] = append(want[x], b.Samples[i])
			if i == 0 || streams[i-1] != x {
				runs++
			}
		}
		spans := m.Split(b)
		if len(spans) != len(order) {
			t.Fatalf("%v: %d spans, want %d", streams, len(spans), len(order))
		}
		for k, sp := range spans {
			if sp.Index != order[k] || sp.Stream != ids[sp.Index] || !slices.Equal(sp.Samples, want[sp.Index]) {
				t.Errorf("%v: span %d = %+v, want stream %d with %v", streams, k, sp, order[k], want[order[k]])
			}
			inBatch := len(sp.Samples) > 0 && &sp.Samples[0] == &b.Samples[slices.Index(streams, sp.Index)]
			if contiguous := runs == len(order); inBatch != contiguous {
				t.Errorf("%v: span %d over the batch %v, want %v", streams, k, inBatch, contiguous)
			}
		}
	}
}

// TestBatchAllocations: once warm, decoding into a reused batch and
// splitting it allocate nothing.
func TestBatchAllocations(t *testing.T) {
	enc, _ := NewTextEncoder(TextEncoderOptions{Stream: true, Decimals: 3})
	in, _ := interleaved(t, enc, []string{"bed-a", "bed-b", "bed-c", "bed-d"}, 500, 2)
	d, _ := NewBatchDecoder(FormatText, DecoderOptions{})
	var b Batch
	d.Decode(&b, enc.Header()) // a header line sets the layout once, as on a link
	in = in[len(enc.Header()):]
	r := NewRouter(nil)
	n := 0
	run := func() {
		for p := in; len(p) > 0; p = p[min(len(p), 4096):] {
			b.Reset()
			d.Decode(&b, p[:min(len(p), 4096)])
			r.Route(&b, func(sp Span, _ int) { n += len(sp.Samples) })
		}
	}
	run()
	if a := testing.AllocsPerRun(20, run); a != 0 {
		t.Errorf("%v allocations per pass, want 0", a)
	}
	if n != 22*2000 { // run once, then once to warm up and 20 times
		t.Errorf("%d samples routed, want %d", n, 22*2000)
	}
}

func TestAdmission(t *testing.T) {
	ward := StreamTemplate{Name: "ward", Pattern: "bed-*"}
	icu := StreamTemplate{Name: "icu", Allow: []string{"icu-1", "icu-2"}}
	tests := []struct {
		name   string
		policy AdmissionPolicy
		ids    []string
		want   []int // template index, -1 no template; -2 ErrNoTemplate, -3 ErrTooManyStreams
		stats  AdmissionStats
	}{
		{"no templates admits all", AdmissionPolicy{}, []string{"a", "b"}, []int{-1, -1}, AdmissionStats{Admitted: 2}},
		{"pattern and list", AdmissionPolicy{Templates: []StreamTemplate{ward, icu}},
			[]string{"bed-1", "icu-2", "icu-3", "bed-", "bed-x", "BED-1", "icu-3"}, []int{0, 1, -2, 0, 0, -2, -2},
			AdmissionStats{Admitted: 4, RefusedIDs: 2}},
		{"first template wins", AdmissionPolicy{Templates: []StreamTemplate{{Name: "all", Pattern: "*"}, ward}},
			[]string{"bed-1"}, []int{0}, AdmissionStats{Admitted: 1}},
		{"class and single character", AdmissionPolicy{Templates: []StreamTemplate{{Name: "ab", Pattern: "[ab]-?"}}},
			[]string{"a-1", "b-2", "c-1", "a-12"}, []int{0, 0, -2, -2}, AdmissionStats{Admitted: 2, RefusedIDs: 2}},
		{"maximum per source", AdmissionPolicy{Templates: []StreamTemplate{ward}, MaxStreams: 2},
			[]string{"bed-1", "bed-2", "bed-3", "bed-1", "bed-3"}, []int{0, 0, -3, 0, -3},
			AdmissionStats{Admitted: 2, RefusedIDs: 1}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			a, err := NewAdmission(tc.policy)
			if err != nil {
				t.Fatal(err)
			}
			for i, id := range tc.ids {
				tpl, err := a.Admit(id)
				got := tpl
				switch {
				case errors.Is(err, ErrNoTemplate):
					got = -2
				case errors.Is(err, ErrTooManyStreams):
					got = -3
				case err != nil:
					t.Fatalf("%s: %v", id, err)
				}
				if got != tc.want[i] {
					t.Errorf("Admit(%q) = %d, %v; want %d", id, tpl, err, tc.want[i])
				}
			}
			if st := a.Stats(); st != tc.stats {
				t.Errorf("stats %+v, want %+v", st, tc.stats)
			}
		})
	}
	a, _ := NewAdmission(AdmissionPolicy{MaxStreams: 1})
	if _, err := a.Admit("x"); err != nil {
		t.Fatal(err)
	}
	if _, err := a.Admit("y"); !errors.Is(err, ErrTooManyStreams) {
		t.Fatalf("second id: %v", err)
	}
	a.Release("x")
	if _, err := a.Admit("y"); err != nil {
		t.Fatalf("after release: %v", err)
	}
}

func TestAdmissionErrors(t *testing.T) {
	for _, p := range []AdmissionPolicy{
		{MaxStreams: -1},
		{Templates: []StreamTemplate{{Name: "empty"}}},
		{Templates: []StreamTemplate{{Name: "bad", Pattern: "bed-[1"}}},
		{Templates: []StreamTemplate{{Name: "bad id", Allow: []string{"bed 1"}}}},
	} {
		if _, err := NewAdmission(p); err == nil {
			t.Errorf("policy %+v accepted", p)
		}
	}
}

// TestRouterRefuses: a router delivers the admitted streams with their
// template and counts the samples of the others, asking the admission once
// per stream.
func TestRouterRefuses(t *testing.T) {
	a, _ := NewAdmission(AdmissionPolicy{Templates: []StreamTemplate{{Name: "ward", Pattern: "bed-*"}}})
	enc, _ := NewTextEncoder(TextEncoderOptions{Stream: true})
	in, sent := interleaved(t, enc, []string{"bed-1", "cafe", "bed-2", "x-ray"}, 400, 3)
	d, _ := NewBatchDecoder(FormatText, DecoderOptions{})
	r := NewRouter(a)
	got := map[string]int{}
	refused := 0
	var b Batch
	for p := in; len(p) > 0; p = p[min(len(p), 3000):] {
		b.Reset()
		d.Decode(&b, p[:min(len(p), 3000)])
		refused += r.Route(&b, func(sp Span, tpl int) {
			if tpl != 0 {
				t.Errorf("%s delivered with template %d", sp.Stream, tpl)
			}
			got[sp.Stream] += len(sp.Samples)
		})
	}
	if got["bed-1"] != len(sent["bed-1"]) || got["bed-2"] != len(sent["bed-2"]) || len(got) != 2 {
		t.Errorf("delivered %v", got)
	}
	want := AdmissionStats{Admitted: 2, RefusedIDs: 2, RefusedSamples: 800}
	if st := a.Stats(); st != want || refused != 800 {
		t.Errorf("stats %+v, refused %d; want %+v", st, refused, want)
	}
}

// BenchmarkDemux splits batches of 256 samples from 100 interleaved
// streams, the worst case for grouping, and from one stream.
func BenchmarkDemux(b *testing.B) {
	for _, nStreams := range []int{1, 100} {
		b.Run(fmt.Sprintf("%d streams", nStreams), func(b *testing.B) {
			batch := &Batch{}
			for i := range nStreams {
				batch.IDs = append(batch.IDs, fmt.Sprintf("bed-%d", i))
			}
			for i := range 256 {
				batch.add(int32(i%nStreams), Sample{TimeS: float64(i)})
			}
			var m Demux
			b.ReportAllocs()
			for b.Loop() {
				m.Split(batch)
			}
			b.ReportMetric(256*float64(b.N)/b.Elapsed().Seconds(), "samples/s")
		})
	}
}

// BenchmarkBatchRoute decodes a text link carrying 100 interleaved streams
// into batches and routes them through an admission of one template: the
// reading goroutine's whole cost per sample before analysis.
func BenchmarkBatchRoute(b *testing.B) {
	streams := make([]string, 100)
	for i := range streams {
		streams[i] = fmt.Sprintf("bed-%d", i)
	}
	enc, _ := NewTextEncoder(TextEncoderOptions{Stream: true, Decimals: 3})
	in, _ := interleaved(b, enc, streams, 100, 4)
	d, _ := NewBatchDecoder(FormatText, DecoderOptions{})
	var batch Batch
	d.Decode(&batch, enc.Header())
	in = in[len(enc.Header()):]
	adm, _ := NewAdmission(AdmissionPolicy{Templates: []StreamTemplate{{Name: "ward", Pattern: "bed-*"}}})
	r := NewRouter(adm)
	n := 0
	b.SetBytes(int64(len(in)))
	b.ReportAllocs()
	cpu0 := processCPU()
	for b.Loop() {
		for p := in; len(p) > 0; p = p[min(len(p), 16<<10):] {
			batch.Reset()
			d.Decode(&batch, p[:min(len(p), 16<<10)])
			r.Route(&batch, func(sp Span, _ int) { n += len(sp.Samples) })
		}
	}
	if n != 10000*b.N {
		b.Fatalf("routed %d samples, want %d", n, 10000*b.N)
	}
	b.ReportMetric(float64(n)/b.Elapsed().Seconds(), "samples/s")
	if cpu := processCPU() - cpu0; cpu > 0 {
		b.ReportMetric(float64(cpu.Nanoseconds())/float64(n), "cpu-ns/sample")
	}
}
