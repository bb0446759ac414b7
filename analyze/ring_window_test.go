package analyze

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/stat"
)

// lsLine is the least-squares line through (xs, ys) from gonum's
// stat.LinearRegression, y = alpha + beta·x, with the mean of xs, the
// residual sum of squares and Σ(x − x̄)², the parts of the textbook
// standard errors (Draper NR, Smith H, "Applied Regression Analysis", 3rd
// ed., 1998).
func lsLine(xs, ys []float64) (alpha, beta, mx, ss, sxx float64) {
	alpha, beta = stat.LinearRegression(xs, ys, nil, false)
	mx = stat.Mean(xs, nil)
	for i, x := range xs {
		r := ys[i] - alpha - beta*x
		ss += r * r
		sxx += (x - mx) * (x - mx)
	}
	return alpha, beta, mx, ss, sxx
}

// lineExtrapolation is the least-squares line through (ts, fs) evaluated
// at t0, with the textbook standard error of that value,
// s·√(1/n + (t0 − t̄)²/Σ(t − t̄)²), s² the residual sum of squares over
// n − 2 (lsLine).
func lineExtrapolation(ts, fs []float64, t0 float64) (f0, se float64) {
	alpha, beta, mt, ss, stt := lsLine(ts, fs)
	n := float64(len(ts))
	return alpha + beta*t0, math.Sqrt(ss/(n-2)) * math.Sqrt(1/n+(t0-mt)*(t0-mt)/stt)
}

// TestRingEndWindow reads the end of an expiration sampled at 25 Hz, its
// flow a falling line with a wobble, through the ring. Over a window of
// five samples the flow at its end and the standard error are those of the
// textbook line through them. Over a window of two samples (0.1 s at 25 Hz
// seen from mid-step) the mean pressure and the flow are still the
// window's, and the standard error, which two samples cannot give, is
// that of the line through the last three.
func TestRingEndWindow(t *testing.T) {
	r := newRing(1)
	const dt = 0.04
	var ts, fs []float64
	for i := range 40 {
		tt := float64(i) * dt
		f := -0.3 + 0.05*tt + 0.004*math.Sin(5*float64(i))
		r.push(tt, 5+0.01*float64(i%3), f)
		ts, fs = append(ts, tt), append(fs, f)
	}
	to := ts[len(ts)-1] + dt/2
	// Five samples.
	_, fe, se, n := r.endWindow(to-0.2+1e-9, to)
	wantF, wantSE := lineExtrapolation(ts[35:], fs[35:], to)
	if n != 5 || math.Abs(fe-wantF) > 1e-12 || math.Abs(se-wantSE) > 1e-9*wantSE {
		t.Errorf("five samples: n %d, flow %.9f ± %.6g, want %.9f ± %.6g", n, fe, se, wantF, wantSE)
	}
	// Two samples.
	mp, fe, se, n := r.endWindow(to-0.07, to)
	wantP := (5 + 0.01*float64(38%3) + 5 + 0.01*float64(39%3)) / 2
	wantF2, _ := lineExtrapolation(ts[38:], fs[38:], to)
	_, wantSE3 := lineExtrapolation(ts[37:], fs[37:], to)
	if n != 2 || math.Abs(mp-wantP) > 1e-12 || math.Abs(fe-wantF2) > 1e-12 || math.Abs(se-wantSE3) > 1e-9*wantSE3 {
		t.Errorf("two samples: n %d, pressure %.6f, flow %.9f ± %.6g; want 2, %.6f, %.9f ± %.6g (three samples)",
			n, mp, fe, se, wantP, wantF2, wantSE3)
	}
}
