package analyze

import (
	"math"
	"testing"
)

// TestLinregSlope checks the slope and its standard error against gonum's
// least-squares line (stat.LinearRegression) and the textbook two-pass
// standard error of a slope, s/√Σ(x − x̄)² with s² the residual sum of
// squares over n − 2 (Draper NR, Smith H, "Applied Regression Analysis",
// 3rd ed., 1998).
func TestLinregSlope(t *testing.T) {
	xs := []float64{0.00, 0.05, 0.10, 0.15, 0.20, 0.25, 0.30, 0.35, 0.40}
	ys := make([]float64, len(xs))
	for i, x := range xs {
		// Flow falling with exhaled volume, τ 0.8 s, and a wobble.
		ys[i] = 0.4 - x/0.8 + 0.003*math.Sin(7*float64(i))
	}
	var l linreg
	for i := range xs {
		l.add(xs[i], ys[i])
	}
	b, se := l.slope()
	_, beta, _, ss, sxx := lsLine(xs, ys)
	wantSE := math.Sqrt(ss/float64(len(xs)-2)) / math.Sqrt(sxx)
	if math.Abs(b-beta) > 1e-12 || math.Abs(se-wantSE) > 1e-9*wantSE {
		t.Errorf("slope %.12g ± %.6g, want %.12g ± %.6g", b, se, beta, wantSE)
	}
	var short linreg
	short.add(0, 1)
	short.add(1, 0)
	if b, se := short.slope(); !math.IsNaN(b) || !math.IsNaN(se) {
		t.Errorf("two points: slope %v ± %v, want NaN", b, se)
	}
}

// TestSlowPoolTurns checks when the pool says slow. A lung whose marks
// turn from those of one compartment (0) to a slow end (m, standard error
// se) is said slow after k slow breaths, the first k for which the
// inverse-variance mean m·k/slowPoolN (equal weights) is at least the
// mark's floor and slowPoolZ of its standard errors se/√slowPoolN
// (derived). Each mark alone (the other NaN) is checked; a mark too noisy
// for slowPoolZ standard errors never says slow; nothing is said before
// slowPoolMin breaths.
func TestSlowPoolTurns(t *testing.T) {
	nan := math.NaN()
	n := float64(slowPoolN)
	firstK := func(m, se, floor float64) int {
		for k := 1; k <= slowPoolN; k++ {
			mean := m * float64(k) / n
			if mean >= floor && mean/(se/math.Sqrt(n)) >= slowPoolZ {
				return k
			}
		}
		return 2 * slowPoolN // never
	}
	var early slowPool
	for i := range slowPoolMin - 1 {
		early.add(slowMarks{0.2, 0.01, 0.2, 0.01})
		if early.slow() {
			t.Fatalf("slow after %d breaths, before %d", i+1, slowPoolMin)
		}
	}
	for _, tt := range []struct {
		name       string
		base, slow slowMarks
		want       int
	}{
		{"flatten", slowMarks{0, 0.05, nan, nan}, slowMarks{0.1, 0.05, nan, nan}, firstK(0.1, 0.05, slowPoolFlatten)},
		{"departure", slowMarks{nan, nan, 0, 0.05}, slowMarks{nan, nan, 0.1, 0.05}, firstK(0.1, 0.05, slowPoolDeparture)},
		{"noisy flatten", slowMarks{0, 0.5, nan, nan}, slowMarks{0.1, 0.5, nan, nan}, 2 * slowPoolN},
		{"faster end", slowMarks{0, 0.05, 0, 0.05}, slowMarks{-0.2, 0.05, -0.2, 0.05}, 2 * slowPoolN},
	} {
		t.Run(tt.name, func(t *testing.T) {
			var p slowPool
			for range 3 * slowPoolN {
				p.add(tt.base)
			}
			if p.slow() {
				t.Fatal("one compartment said slow")
			}
			turned := 0
			for ; !p.slow() && turned < 2*slowPoolN; turned++ {
				p.add(tt.slow)
			}
			if turned != tt.want {
				t.Errorf("slow after %d slow breaths, want %d", turned, tt.want)
			}
		})
	}
}

// TestSlowPoolHolds checks the hysteresis of the verdict. With equal
// standard errors se the pool's mean is the marks' mean m and its z is
// m·√slowPoolN/se (derived). Weak marks (m 0.025, se 0.05: z 1.9, under
// the flattening floor of 0.03) do not make a slow end, but keep one the
// pool has shown (z at least slowPoolZKeep, m at least slowPoolKeepFloor
// of the floor); a pool of marks that cannot be weighed (time constants
// not measured) keeps the last verdict, whichever it was; marks of one
// compartment (m 0) clear it, and weak marks then do not bring it back.
func TestSlowPoolHolds(t *testing.T) {
	nan := math.NaN()
	strong := slowMarks{0.1, 0.05, nan, nan}
	weak := slowMarks{0.025, 0.05, nan, nan}
	none := slowMarks{nan, nan, nan, nan}
	one := slowMarks{0, 0.05, nan, nan}
	if z := weak.flatten * math.Sqrt(slowPoolN) / weak.flattenSE; z < slowPoolZKeep || z >= slowPoolZ ||
		weak.flatten >= slowPoolFlatten || weak.flatten < slowPoolKeepFloor*slowPoolFlatten {
		t.Fatalf("weak marks: z %.2f, mean %.3f: not between the two thresholds", z, weak.flatten)
	}
	fill := func(p *slowPool, m slowMarks) bool {
		for range slowPoolN {
			p.add(m)
		}
		return p.slow()
	}
	var fresh slowPool
	if fill(&fresh, weak) {
		t.Fatal("weak marks made a slow end")
	}
	if fill(&fresh, none) {
		t.Fatal("marks that cannot be weighed made a slow end")
	}
	var p slowPool
	for _, step := range []struct {
		name  string
		marks slowMarks
		want  bool
	}{
		{"strong", strong, true},
		{"weak after strong", weak, true},
		{"none after weak", none, true},
		{"one compartment", one, false},
		{"weak after one compartment", weak, false},
		{"none after that", none, false},
	} {
		if got := fill(&p, step.marks); got != step.want {
			t.Errorf("%s: slow %v, want %v", step.name, got, step.want)
		}
	}
}
