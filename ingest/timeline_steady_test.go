package ingest

import (
	"math"
	"math/rand/v2"
	"reflect"
	"slices"
	"testing"
)

// TestTimelineSteadyAgainstAdmit feeds the same jittery, drifting and
// gappy sample times to a timeline through Timelines.Admit (which takes
// its common case through steady) and to one through admit alone, and
// checks that both deliver the same times with the same verdicts and end
// in the same state, drift episodes included.
func TestTimelineSteadyAgainstAdmit(t *testing.T) {
	r := rand.New(rand.NewPCG(5, 9))
	for round := range 20 {
		rate := []float64{0, 100, 200}[round%3]
		tls, ref := NewTimelines(rate), newTimeline(rate)
		tS, period, steadyTaken := 0.0, 0.005, 0
		for i := range 20000 {
			if i%4000 == 3999 {
				period *= 1 + (r.Float64()-0.5)*0.06 // now and then a drift
			}
			tS = timingFault(r, tS, 500, false)
			tS += period * (1 + (r.Float64()-0.5)*0.1)
			want, v, _, _ := ref.admit(tS)
			if tl, ok := tls.tls.Get("s"); ok && tl.nMean >= driftWindow-1 {
				steadyTaken++
			}
			got, gap, ok := tls.Admit("s", Sample{TimeS: tS})
			if ok != (v != duplicate && v != outOfOrder) || ok && got.TimeS != want || (gap != nil) != (v == keepAfterGap || v == keepAfterReset) {
				t.Fatalf("round %d sample %d: Admit %v %v %v, admit %v %v", round, i, got.TimeS, gap, ok, want, v)
			}
		}
		if tl, _ := tls.tls.Get("s"); !reflect.DeepEqual(*tl, *ref) {
			t.Fatalf("round %d: states differ: %+v and %+v", round, *tl, *ref)
		}
		if steadyTaken < 10000 {
			t.Fatalf("round %d: the steady case came up %d times", round, steadyTaken)
		}
	}
}

// TestAdmitRunMatchesAdmit checks that Timelines.AdmitRun, given runs of
// samples, keeps, drops and times them exactly as Admit one at a time, and
// hands each gap on between the samples before it and the one after it.
func TestAdmitRunMatchesAdmit(t *testing.T) {
	r := rand.New(rand.NewPCG(7, 3))
	var in []Sample
	tS := 0.0
	for i := range 30000 {
		tS = timingFault(r, tS, 400, true)
		tS += 0.005 * (1 + (r.Float64()-0.5)*0.1)
		in = append(in, Sample{TimeS: tS, PressureCmH2O: float64(i)})
	}
	// One at a time: the delivered samples, a gap marked by a sample with
	// a NaN pressure before the sample it precedes.
	var want []Sample
	one := NewTimelines(0)
	for _, s := range in {
		got, gap, ok := one.Admit("s", s)
		if gap != nil {
			want = append(want, Sample{TimeS: gap.GapS, PressureCmH2O: math.NaN()})
		}
		if ok {
			want = append(want, got)
		}
	}
	gaps := 0
	for _, s := range want {
		gaps += b2i(math.IsNaN(s.PressureCmH2O))
	}
	if gaps < 50 || len(want) < 25000 {
		t.Fatalf("%d gaps, %d samples delivered: not a test of the runs", gaps, len(want))
	}
	for _, run := range []int{1, 3, 256, len(in)} {
		tls := NewTimelines(0)
		var got []Sample
		dropped := 0
		onGap := func(before []Sample, ev *Event) {
			got = append(got, before...)
			got = append(got, Sample{TimeS: ev.GapS, PressureCmH2O: math.NaN()})
		}
		for i := 0; i < len(in); i += run {
			ss := slices.Clone(in[i:min(i+run, len(in))])
			kept, d := tls.AdmitRun("s", ss, onGap)
			got, dropped = append(got, kept...), dropped+d
		}
		if len(got) != len(want) || dropped != len(in)-(len(want)-gaps) {
			t.Fatalf("runs of %d: %d delivered (gaps included) and %d dropped, one at a time %d and %d",
				run, len(got), dropped, len(want), len(in)-(len(want)-gaps))
		}
		for i := range got {
			if math.Float64bits(got[i].TimeS) != math.Float64bits(want[i].TimeS) ||
				math.Float64bits(got[i].PressureCmH2O) != math.Float64bits(want[i].PressureCmH2O) {
				t.Fatalf("runs of %d: item %d is %+v, one at a time %+v", run, i, got[i], want[i])
			}
		}
	}
}

func b2i(c bool) int {
	if c {
		return 1
	}
	return 0
}

// timingFault moves the time tS of the previous sample now and then, as a
// faulty device does, before the next interval is added: one draw in n
// adds a gap of 0.5 s, one steps back 2 ms (the next sample comes out of
// order), one 5 s (a clock reset), and with dup one a whole 5 ms period
// (a duplicate, at a 200 Hz rate).
func timingFault(r *rand.Rand, tS float64, n int, dup bool) float64 {
	switch k := r.IntN(n); {
	case k == 0:
		return tS + 0.5
	case k == 1:
		return tS - 0.002
	case k == 2:
		return tS - 5
	case k == 3 && dup:
		return tS - 0.005
	}
	return tS
}
