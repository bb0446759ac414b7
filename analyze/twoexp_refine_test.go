package analyze

import (
	"math"
	"math/rand/v2"
	"testing"
)

// twoExpBreath loads a passive expiration |V'|(s) = a1·e^(−s/τ1) +
// a2·e^(−s/τ2) sampled at 50 Hz over te seconds, plus Gaussian flow noise
// of sd L/s, into a fresh analyzer, and returns it with the closed-form
// volume still to exhale at te, Σ aᵢ·τᵢ·e^(−te/τᵢ).
func twoExpBreath(a1, tau1, a2, tau2, te, sd float64, rng *rand.Rand) (*Analyzer, float64) {
	a := &Analyzer{}
	a.buf.reset()
	vol := 0.6
	a.expStartT, a.expStartV = 1, vol
	n := int(te * 50)
	for i := range n {
		s := float64(i) / 50
		f := -(a1*math.Exp(-s/tau1) + a2*math.Exp(-s/tau2))
		if sd > 0 {
			f += sd * rng.NormFloat64()
		}
		v := vol - (a1*tau1*(1-math.Exp(-s/tau1)) + a2*tau2*(1-math.Exp(-s/tau2)))
		a.buf.pts[a.buf.n] = point{t: 1 + s, f: f, v: v, p: 5}
		a.buf.n++
	}
	return a, a1*tau1*math.Exp(-te/tau1) + a2*tau2*math.Exp(-te/tau2)
}

// TestTwoExpOffGrid recovers time constants that lie between the grid
// points from a noiseless sum of two exponentials, the passive emptying of
// two parallel compartments (Otis AB et al., "Mechanical factors in
// distribution of pulmonary ventilation", J Appl Physiol 1956;8:427), by
// variable projection (Golub GH, Pereyra V, SIAM J Numer Anal 1973;10:413),
// and compares the volume still to exhale with the closed form.
func TestTwoExpOffGrid(t *testing.T) {
	cases := []struct{ a1, tau1, a2, tau2, te float64 }{
		{0.76, 0.387, 0.056, 2.635, 2.0}, // unit time constants 10× apart, R 15
		{0.40, 0.775, 0.030, 5.27, 2.0},  // the same lung at R 30
		{0.90, 0.30, 0.12, 1.10, 2.5},    // 3× apart
	}
	for _, c := range cases {
		a, want := twoExpBreath(c.a1, c.tau1, c.a2, c.tau2, c.te, 0, nil)
		vte := a.expStartV - a.buf.pts[a.buf.n-1].v
		ef := a.fitTwoExp(vte, 1+c.te)
		if !ef.ok || !ef.two {
			t.Fatalf("%+v: no two-exponential fit: %+v", c, ef)
		}
		if got := ef.remaining(c.te); math.Abs(got-want) > 0.03*want {
			t.Errorf("%+v: remaining %.4f L, want %.4f L (closed form) within 3 %%", c, got, want)
		}
		if math.Abs(ef.tau2/c.tau2-1) > 0.05 || math.Abs(ef.tau1/c.tau1-1) > 0.02 {
			t.Errorf("%+v: τ %.3f/%.3f s, want %.3f/%.3f s", c, ef.tau1, ef.tau2, c.tau1, c.tau2)
		}
	}
}

// TestTwoExpNoisyBound: with 0.3 L/min of flow noise the volume the fit
// leaves is a lower confidence bound (one-sided 97.5 %, profile residual
// within χ²₁(0.95) = 3.84 noise variances; Venzon DJ, Moolgavkar SH, Appl
// Stat 1988;37:87) of the closed form: above it on at most 2 of 40
// expirations. It is conservative: at least half of the closed form on
// only 23 of these 40 (measured), so more than half is asked.
func TestTwoExpNoisyBound(t *testing.T) {
	const a1, tau1, a2, tau2, te = 0.76, 0.387, 0.056, 2.635, 2.0
	rng := rand.New(rand.NewPCG(1, 2))
	above, half := 0, 0
	for range 40 {
		a, want := twoExpBreath(a1, tau1, a2, tau2, te, 0.3/60, rng)
		vte := a.expStartV - a.buf.pts[a.buf.n-1].v
		ef := a.fitTwoExp(vte, 1+te)
		if !ef.ok || !ef.two {
			continue
		}
		got := ef.remaining(te)
		if got > want*1.02 {
			above++
		}
		if got >= want/2 {
			half++
		}
	}
	if above > 2 {
		t.Errorf("bound above the closed form on %d of 40 expirations, want at most 2", above)
	}
	if half < 20 {
		t.Errorf("bound at least half of the closed form on %d of 40 expirations, want more than half", half)
	}
}
