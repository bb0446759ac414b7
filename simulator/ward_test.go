package simulator

import (
	"bytes"
	"encoding/json"
	"slices"
	"testing"
	"time"

	"trapline/ingest"
)

// twoBeds are two steady patients of different rates (15 and 20 breaths a
// minute) with sensor noise and seeds of their own.
func twoBeds(t *testing.T, durationS float64) []Scenario {
	t.Helper()
	a := Steady{RCmH2OSPerL: 10, CMLPerCmH2O: 50, VtML: 500, FlowLPM: 50, RateBPM: 15, PEEPCmH2O: 5,
		SampleRateHz: 100, DurationS: durationS, Seed: 3}.Scenario()
	b := Steady{RCmH2OSPerL: 20, CMLPerCmH2O: 40, VtML: 450, FlowLPM: 45, RateBPM: 20, PEEPCmH2O: 8,
		SampleRateHz: 125, DurationS: durationS, Seed: 4}.Scenario()
	a.Sensor, b.Sensor = simNoiseForTest, simNoiseForTest
	a.Stream, b.Stream = "bed-a", "bed-b"
	return []Scenario{a, b}
}

var simNoiseForTest = Sensor{PressureNoiseCmH2O: 0.2, FlowNoiseLPM: 0.5}

// wardBytes runs the scenarios as one ward and returns the samples and
// the ground truth written.
func wardBytes(t *testing.T, scs []Scenario, opts WardOptions) ([]byte, []byte) {
	t.Helper()
	var sims []*Sim
	for _, sc := range scs {
		s, err := New(sc)
		if err != nil {
			t.Fatal(err)
		}
		sims = append(sims, s)
	}
	var out, truth bytes.Buffer
	opts.Truth = &truth
	if _, err := StreamWard(t.Context(), sims, &writerOutput{w: &out}, opts); err != nil {
		t.Fatal(err)
	}
	return out.Bytes(), truth.Bytes()
}

// TestWardEachAsAlone: the samples and ground truth of each stream of a
// ward, read back by the ingest decoders, are those of its patient run
// alone, and the interleaving is the stable time order of all samples
// (ties in the order of the patients), computed here by sorting.
func TestWardEachAsAlone(t *testing.T) {
	scs := twoBeds(t, 40)
	type stamped struct {
		tS float64
		k  int
	}
	var wantOrder []stamped
	wantSamples := map[string][]ingest.Sample{}
	var wantTruth []Truth
	for k, sc := range scs {
		smp, tr, err := Run(sc)
		if err != nil {
			t.Fatal(err)
		}
		wantSamples[sc.Stream] = smp
		wantTruth = append(wantTruth, tr...)
		for _, s := range smp {
			wantOrder = append(wantOrder, stamped{s.TimeS, k})
		}
	}
	slices.SortStableFunc(wantOrder, func(a, b stamped) int {
		if a.tS != b.tS {
			if a.tS < b.tS {
				return -1
			}
			return 1
		}
		return a.k - b.k
	})
	for _, tc := range []struct {
		format ingest.Format
		tol    float64 // binary is fixed point: 1e-3 cmH2O and 1e-4 L/s, from DefaultScale
	}{{ingest.FormatText, 0}, {ingest.FormatBinary, 1e-3}} {
		t.Run(string(tc.format), func(t *testing.T) {
			data, truth := wardBytes(t, scs, WardOptions{Format: tc.format})
			got := map[string][]ingest.Sample{}
			var order []string
			dec, err := ingest.NewDecoder(tc.format, ingest.DecoderOptions{}, func(id string, s ingest.Sample) {
				got[id] = append(got[id], s)
				order = append(order, id)
			})
			if err != nil {
				t.Fatal(err)
			}
			if err := ingest.Decode(bytes.NewReader(data), dec); err != nil {
				t.Fatal(err)
			}
			if st := dec.Stats(); st.BadLines+st.BadFrames > 0 {
				t.Fatalf("decoder rejected input: %+v", st)
			}
			for _, sc := range scs {
				compareSamples(t, got[sc.Stream], wantSamples[sc.Stream], tc.tol)
			}
			if len(order) != len(wantOrder) {
				t.Fatalf("%d samples, want %d", len(order), len(wantOrder))
			}
			for i, o := range wantOrder {
				if order[i] != scs[o.k].Stream {
					t.Fatalf("sample %d is of %s, want %s", i, order[i], scs[o.k].Stream)
				}
			}
			var gotTruth []Truth
			for line := range bytes.Lines(truth) {
				var tr Truth
				if err := json.Unmarshal(line, &tr); err != nil {
					t.Fatal(err)
				}
				gotTruth = append(gotTruth, tr)
			}
			for _, sc := range scs {
				g := slices.DeleteFunc(slices.Clone(gotTruth), func(tr Truth) bool { return tr.Stream != sc.Stream })
				w := slices.DeleteFunc(slices.Clone(wantTruth), func(tr Truth) bool { return tr.Stream != sc.Stream })
				if len(g) < 8 || len(g) != len(w) {
					t.Fatalf("%s: %d truth records, want %d", sc.Stream, len(g), len(w))
				}
				for i := range g {
					if g[i].StartS != w[i].StartS || g[i].EndS != w[i].EndS {
						t.Fatalf("%s breath %d: %+v, want %+v", sc.Stream, i, g[i], w[i])
					}
				}
			}
		})
	}
}

// TestWardDeterministic: the same patients give the same bytes; another
// seed for one of them gives other bytes.
func TestWardDeterministic(t *testing.T) {
	scs := twoBeds(t, 20)
	a, ta := wardBytes(t, scs, WardOptions{Decimals: 3})
	b, tb := wardBytes(t, scs, WardOptions{Decimals: 3})
	if !bytes.Equal(a, b) || !bytes.Equal(ta, tb) {
		t.Fatal("same patients gave different bytes")
	}
	if !bytes.HasPrefix(a, []byte("stream,time[s],pressure[cmH2O],flow[L/min]\n")) {
		t.Fatalf("header %q", a[:min(len(a), 50)])
	}
	scs[1].Seed++
	if c, _ := wardBytes(t, scs, WardOptions{Decimals: 3}); bytes.Equal(a, c) {
		t.Fatal("another seed gave the same bytes")
	}
}

// TestWardPaced: at 10 times real time, 2 s of a ward take at least the
// due time of the last sample (1.992 s, the 125 Hz bed's) over 10, less one
// pacing tick (samples due within a tick are written without a sleep).
func TestWardPaced(t *testing.T) {
	start := time.Now()
	wardBytes(t, twoBeds(t, 2), WardOptions{Speed: 10})
	lastS := 2 - 1.0/125
	if d, least := time.Since(start), time.Duration((lastS/10-paceTickS)*float64(time.Second)); d < least {
		t.Fatalf("2 s at speed 10 took %v, want at least %v", d, least)
	}
}

func TestWardErrors(t *testing.T) {
	scs := twoBeds(t, 5)
	scs[1].Stream = scs[0].Stream
	var sims []*Sim
	for _, sc := range scs {
		s, _ := New(sc)
		sims = append(sims, s)
	}
	out := &writerOutput{w: &bytes.Buffer{}}
	for name, tc := range map[string]struct {
		sims []*Sim
		opts WardOptions
	}{
		"same id":    {sims, WardOptions{}},
		"no patient": {nil, WardOptions{}},
		"format":     {sims[:1], WardOptions{Format: "csv"}},
		"speed":      {sims[:1], WardOptions{Speed: -1}},
	} {
		if _, err := StreamWard(t.Context(), tc.sims, out, tc.opts); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
}

func TestWardScenarios(t *testing.T) {
	scs, err := WardScenarios(twoBeds(t, 5), 5, "")
	if err != nil {
		t.Fatal(err)
	}
	var ids []string
	for _, sc := range scs {
		ids = append(ids, sc.Stream)
	}
	if !slices.Equal(ids, []string{"bed-1", "bed-2", "bed-3", "bed-4", "bed-5"}) || scs[2].Seed != 3+2 || scs[3].SampleRateHz != 125 {
		t.Errorf("ids %v, seeds and rates %+v", ids, scs)
	}
	if _, err := WardScenarios(nil, 3, ""); err == nil {
		t.Error("no scenarios accepted")
	}
	if _, err := WardScenarios(scs, 2, "a-very-long-prefix-for-a-stream-id"); err == nil {
		t.Error("an id over 32 characters accepted")
	}
}
