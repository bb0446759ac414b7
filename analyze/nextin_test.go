package analyze

import (
	"math"
	"reflect"
	"testing"
)

// TestNextInMatchesNext feeds the closed-form linear lung of synth_test.go
// (with sensor noise and now and then a sample without a usable time) to
// one analyzer one sample at a time and to another in runs bounded by
// one-second windows, as an offline pipeline's ticks bound them: the same
// breath records come out, NextIn feeds only samples inside its window and
// stops at the first one outside it.
func TestNextInMatchesNext(t *testing.T) {
	m := linearVC{R: 20, C: 0.05, PEEP: 5, VT: 0.5, Rate: 20, TFlow: 0.8, Pause: 0.2, Fs: 100, NoiseP: 0.3, NoiseF: 1.0 / 60, Seed: 3}
	ss := m.samples(30)
	for i := 50; i < len(ss); i += 173 {
		ss[i].TimeS = math.NaN()
	}
	one, runs := NewAnalyzer("s", DefaultConfig()), NewAnalyzer("s", DefaultConfig())
	// The records compared as their JSON: NaN fields are equal there.
	var want, got []string
	for _, s := range ss {
		if b := one.Next(s); b != nil {
			want = append(want, string(b.AppendJSON(nil)))
		}
	}
	for i := 0; i < len(ss); {
		from := math.Floor(ss[i].TimeS)
		n, b := runs.NextIn(ss[i:], from, from+1)
		for _, s := range ss[i : i+n] {
			if !(s.TimeS >= from && s.TimeS < from+1) {
				t.Fatalf("sample at %v fed in the window [%v, %v)", s.TimeS, from, from+1)
			}
		}
		if b != nil {
			got = append(got, string(b.AppendJSON(nil)))
		} else if i+n < len(ss) && ss[i+n].TimeS >= from && ss[i+n].TimeS < from+1 {
			t.Fatalf("stopped at %v, inside the window [%v, %v)", ss[i+n].TimeS, from, from+1)
		}
		if n == 0 { // a sample without a time: no window holds it
			runs.Next(ss[i])
			n = 1
		}
		i += n
	}
	if len(want) < 25 || !reflect.DeepEqual(got, want) {
		t.Fatalf("runs gave %d breaths, one at a time %d; they differ", len(got), len(want))
	}
}
