package analyze

import "math"

// rohrerFit is the equation of motion with a flow-dependent resistance,
// P = K1·V' + K2·V'·|V'| + E·V + P0 (Rohrer F, 1915), fitted by ordinary
// least squares.
type rohrerFit struct {
	k1, k2, e, p0 float64
	sse, sseLin   float64 // residual sums of squares of this fit and of the linear one
	sst           float64 // sum of squares of pressure about its mean
	n             int
	ok            bool
}

// Significance of the flow dependence (our choice): the Rohrer term must
// remove at least rohrerMinGain (at a high resistance most of the residual
// is flow noise times R, so the share is small even when the term is real) of the linear fit's residual sum of
// squares and pass an F test of one added parameter at rohrerMinF
// (roughly p < 0.001 for the point counts of a breath).
const (
	rohrerMinGain = 0.05
	rohrerMinF    = 12
)

// fitRohrer fits the Rohrer equation of motion to the decimated points of
// the breath before endT. It returns ok only when the flow-dependent term
// is significant, positive, and leaves a positive K1 and elastance.
func fitRohrer(pts []point, endT float64) rohrerFit {
	// Points beside a step of flow (the valves switching) carry the
	// sampling's timing error times the resistance; they are left out so
	// that the fit sees the flow dependence, not the steps.
	maxF := 0.0
	for i := range pts {
		if af := math.Abs(pts[i].f); af > maxF {
			maxF = af
		}
	}
	lim := 0.15 * maxF
	// The sums are kept in locals (registers) rather than in the matrix: a
	// Go array lives in memory, and a load and store per term and point
	// cost more than the arithmetic. The order of the additions is the
	// same, so the sums are the same.
	var s00, s01, s02, s03, s04, s11, s12, s13, s14, s22, s23, s24, s34, s44 float64
	n := 0
	nextStep := false // whether the flow steps from point i to point i+1
	for i := range pts {
		q := &pts[i]
		if q.t >= endT {
			break
		}
		prevStep := nextStep
		nextStep = i+1 < len(pts) && math.Abs(pts[i+1].f-q.f) > lim
		if prevStep || nextStep {
			continue
		}
		f, v, p := q.f, q.v, q.p
		fa := f * math.Abs(f)
		s00 += f * f
		s01 += f * fa
		s02 += f * v
		s03 += f
		s04 += f * p
		s11 += fa * fa
		s12 += fa * v
		s13 += fa
		s14 += fa * p
		s22 += v * v
		s23 += v
		s24 += v * p
		s34 += p
		s44 += p * p
		n++
	}
	s33 := float64(n)   // the count, exact as a float64
	s := [5][5]float64{ // normal equations of [f, f|f|, v, 1] against p in column 4
		{s00, s01, s02, s03, s04},
		{s01, s11, s12, s13, s14},
		{s02, s12, s22, s23, s24},
		{s03, s13, s23, s33, s34},
		{s04, s14, s24, s34, s44},
	}
	if n < 12 {
		return rohrerFit{}
	}
	full, okFull := solveNormal(s, []int{0, 1, 2, 3})
	lin, okLin := solveNormal(s, []int{0, 2, 3})
	if !okFull || !okLin {
		return rohrerFit{}
	}
	sse := residualSS(s, []int{0, 1, 2, 3}, &full)
	sseLin := residualSS(s, []int{0, 2, 3}, &lin)
	f := rohrerFit{k1: full[0], k2: full[1], e: full[2], p0: full[3], sse: sse, sseLin: sseLin, n: n,
		sst: math.Max(0, s44-s34*s34/s33)}
	gain := sseLin - sse
	f.ok = f.k2 > 0 && f.k1 > 0 && f.e > 0 && sse > 0 &&
		gain > rohrerMinGain*sseLin && gain/(sse/float64(n-4)) > rohrerMinF
	return f
}

// solveNormal solves the normal equations s restricted to the columns
// idx (the response in column 4) by Gaussian elimination with partial
// pivoting.
func solveNormal(s [5][5]float64, idx []int) ([4]float64, bool) {
	m := len(idx)
	var a [4][5]float64
	for r := range m {
		for c := range m {
			a[r][c] = s[idx[r]][idx[c]]
		}
		a[r][m] = s[idx[r]][4]
	}
	for c := range m {
		p := c
		for r := c + 1; r < m; r++ {
			if math.Abs(a[r][c]) > math.Abs(a[p][c]) {
				p = r
			}
		}
		if a[p][c] == 0 {
			return [4]float64{}, false
		}
		a[c], a[p] = a[p], a[c]
		for r := c + 1; r < m; r++ {
			k := a[r][c] / a[c][c]
			for j := c; j <= m; j++ {
				a[r][j] -= k * a[c][j]
			}
		}
	}
	var x [4]float64 // an array, not a slice: no allocation a breath
	for r := m - 1; r >= 0; r-- {
		v := a[r][m]
		for j := r + 1; j < m; j++ {
			v -= a[r][j] * x[j]
		}
		x[r] = v / a[r][r]
		if math.IsNaN(x[r]) || math.IsInf(x[r], 0) {
			return [4]float64{}, false
		}
	}
	return x, true
}

// residualSS is the residual sum of squares Σ(p − x·β)² of a solution β
// over columns idx, from the normal equations: Σp² − 2β·Xᵀp + βᵀXᵀXβ.
func residualSS(s [5][5]float64, idx []int, beta *[4]float64) float64 {
	ss := s[4][4]
	for i, r := range idx {
		ss -= 2 * beta[i] * s[r][4]
		for j, c := range idx {
			ss += beta[i] * beta[j] * s[r][c]
		}
	}
	return math.Max(0, ss)
}

// r2 is the coefficient of determination of the Rohrer fit.
func (f *rohrerFit) r2() float64 {
	if !(f.sst > 0) {
		return math.NaN()
	}
	return 1 - f.sse/f.sst
}
