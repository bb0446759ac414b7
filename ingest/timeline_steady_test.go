package ingest

import (
	"math/rand/v2"
	"reflect"
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
			switch k := r.IntN(500); {
			case k == 0:
				tS += 0.5 // a gap
			case k == 1:
				tS -= 0.002 // out of order
			case k == 2:
				tS -= 5 // a clock reset
			}
			tS += period * (1 + (r.Float64()-0.5)*0.1)
			want, v, _, _ := ref.admit(tS)
			if tl := tls.lastTL; tl != nil && tl.nMean >= driftWindow-1 {
				steadyTaken++
			}
			got, gap, ok := tls.Admit("s", Sample{TimeS: tS})
			if ok != (v != duplicate && v != outOfOrder) || ok && got.TimeS != want || (gap != nil) != (v == keepAfterGap || v == keepAfterReset) {
				t.Fatalf("round %d sample %d: Admit %v %v %v, admit %v %v", round, i, got.TimeS, gap, ok, want, v)
			}
		}
		if !reflect.DeepEqual(*tls.lastTL, *ref) {
			t.Fatalf("round %d: states differ: %+v and %+v", round, *tls.lastTL, *ref)
		}
		if steadyTaken < 10000 {
			t.Fatalf("round %d: the steady case came up %d times", round, steadyTaken)
		}
	}
}
