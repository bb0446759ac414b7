package analyze

import (
	"math"
	"slices"
	"testing"
)

// TestPoolMedian checks the pool's median against the definition computed
// with the standard library's sort (slices.Sort): the middle value, or the
// mean of the two middle ones; NaN and ±Inf skipped; NaN below slowPoolMin
// finite values.
func TestPoolMedian(t *testing.T) {
	nan, inf := math.NaN(), math.Inf(1)
	for _, tt := range []struct {
		name string
		v    []float64
	}{
		{"odd", []float64{1.2, 0.9, 1.1, 1.0, 1.3, 0.8, 1.05, 1.15, 0.95}},
		{"even", []float64{3, 1, 4, 1, 5, 9, 2, 6}},
		{"full", []float64{15, 14, 13, 12, 11, 10, 9, 8, 7, 6, 5, 4, 3, 2, 1}},
		{"with NaN and Inf", []float64{nan, 1, 2, inf, 3, 4, -inf, 5, 6, 7, 8, nan}},
		{"too few", []float64{1, 2, 3, nan, nan, nan, nan, nan}},
	} {
		t.Run(tt.name, func(t *testing.T) {
			var finite []float64
			for _, x := range tt.v {
				if !math.IsNaN(x) && !math.IsInf(x, 0) {
					finite = append(finite, x)
				}
			}
			slices.Sort(finite)
			want := math.NaN()
			if k := len(finite); k >= slowPoolMin {
				want = (finite[(k-1)/2] + finite[k/2]) / 2
			}
			got := poolMedian(tt.v)
			if !(got == want || math.IsNaN(got) && math.IsNaN(want)) {
				t.Errorf("median %v, want %v", got, want)
			}
		})
	}
}

// TestSlowPoolKeepsRecent checks that the pool speaks from slowPoolMin
// breaths on and forgets the oldest after slowPoolN: a lung whose marks
// turn from those of one compartment (ratio 1, departure 0) to a slow end
// is said slow once enough of the kept breaths are. By the median ratio
// alone (1.1; departures unknown) that is most of them, slowPoolN/2 + 1.
// By the departures alone (0.1 with a standard error se; ratios unknown),
// k slow breaths of slowPoolN give an inverse-variance mean of
// 0.1·k/slowPoolN with a standard error se/√slowPoolN (equal weights), so
// the first k that passes both slowPoolDeparture and slowPoolZ standard
// errors (derived); with se = 0.5 the mean can never reach slowPoolZ
// standard errors.
func TestSlowPoolKeepsRecent(t *testing.T) {
	nan := math.NaN()
	var p slowPool
	for i := range slowPoolMin - 1 {
		p.add(1.2, 0.2, 0.05)
		if p.slow() {
			t.Fatalf("slow after %d breaths, before %d", i+1, slowPoolMin)
		}
	}
	n := float64(slowPoolN)
	firstK := func(se float64) int {
		for k := 1; k <= slowPoolN; k++ {
			mean := 0.1 * float64(k) / n
			if mean >= slowPoolDeparture && mean/(se/math.Sqrt(n)) >= slowPoolZ {
				return k
			}
		}
		return -1
	}
	for _, tt := range []struct {
		name           string
		ratio, dep, se float64
		want           int
	}{
		{"ratio", 1.1, nan, 0.05, slowPoolN/2 + 1},
		{"departure", nan, 0.1, 0.05, firstK(0.05)},
		{"noisy departure", nan, 0.1, 0.5, firstK(0.5)},
	} {
		t.Run(tt.name, func(t *testing.T) {
			p := slowPool{}
			for range 3 * slowPoolN {
				p.add(1, 0, tt.se)
			}
			if p.slow() {
				t.Fatal("one compartment said slow")
			}
			turned := 0
			for ; !p.slow() && turned < 2*slowPoolN; turned++ {
				p.add(tt.ratio, tt.dep, tt.se)
			}
			if tt.want < 0 {
				tt.want = 2 * slowPoolN // never
			}
			if turned != tt.want {
				t.Errorf("slow after %d slow breaths, want %d", turned, tt.want)
			}
		})
	}
}
