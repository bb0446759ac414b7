package analyze

import "math"

// rohrerFit is the equation of motion with a flow-dependent resistance,
// P = K1·V' + K2·V'·|V'| + E·V + P0 (Rohrer F, 1915), fitted by ordinary
// least squares.
type rohrerFit struct {
	k1, k2, e, p0 float64
	sse, sseLin   float64 // residual sums of squares of this fit and of the linear one
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
	var s [5][5]float64 // normal equations of [f, f|f|, v, 1] against p in column 4
	n := 0
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
		fa := q.f * math.Abs(q.f)
		s[0][0] += q.f * q.f
		s[0][1] += q.f * fa
		s[0][2] += q.f * q.v
		s[0][3] += q.f
		s[0][4] += q.f * q.p
		s[1][1] += fa * fa
		s[1][2] += fa * q.v
		s[1][3] += fa
		s[1][4] += fa * q.p
		s[2][2] += q.v * q.v
		s[2][3] += q.v
		s[2][4] += q.v * q.p
		s[3][3]++
		s[3][4] += q.p
		s[4][4] += q.p * q.p
		n++
	}
	for r := range 5 {
		for c := range r {
			s[r][c] = s[c][r]
		}
	}
	if n < 12 {
		return rohrerFit{}
	}
	full, okFull := solveNormal(s, []int{0, 1, 2, 3})
	lin, okLin := solveNormal(s, []int{0, 2, 3})
	if !okFull || !okLin {
		return rohrerFit{}
	}
	sse := residualSS(s, []int{0, 1, 2, 3}, full)
	sseLin := residualSS(s, []int{0, 2, 3}, lin)
	f := rohrerFit{k1: full[0], k2: full[1], e: full[2], p0: full[3], sse: sse, sseLin: sseLin, n: n}
	gain := sseLin - sse
	f.ok = f.k2 > 0 && f.k1 > 0 && f.e > 0 && sse > 0 &&
		gain > rohrerMinGain*sseLin && gain/(sse/float64(n-4)) > rohrerMinF
	return f
}

// solveNormal solves the normal equations s restricted to the columns
// idx (the response in column 4) by Gaussian elimination with partial
// pivoting.
func solveNormal(s [5][5]float64, idx []int) ([]float64, bool) {
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
			return nil, false
		}
		a[c], a[p] = a[p], a[c]
		for r := c + 1; r < m; r++ {
			k := a[r][c] / a[c][c]
			for j := c; j <= m; j++ {
				a[r][j] -= k * a[c][j]
			}
		}
	}
	x := make([]float64, m)
	for r := m - 1; r >= 0; r-- {
		v := a[r][m]
		for j := r + 1; j < m; j++ {
			v -= a[r][j] * x[j]
		}
		x[r] = v / a[r][r]
		if math.IsNaN(x[r]) || math.IsInf(x[r], 0) {
			return nil, false
		}
	}
	return x, true
}

// residualSS is the residual sum of squares Σ(p − x·β)² of a solution β
// over columns idx, from the normal equations: Σp² − 2β·Xᵀp + βᵀXᵀXβ.
func residualSS(s [5][5]float64, idx []int, beta []float64) float64 {
	ss := s[4][4]
	for i, r := range idx {
		ss -= 2 * beta[i] * s[r][4]
		for j, c := range idx {
			ss += beta[i] * beta[j] * s[r][c]
		}
	}
	return math.Max(0, ss)
}
