package analyze

import "math"

// Order statistics for the detectors: the median, selection and the
// Theil–Sen slope of a trend window.

// detMedian returns the median of vs (reordered in place), or NaN when
// empty. It selects rather than sorts (detSelect, linear time expected),
// because the trend detector takes medians of thousands of pairwise slopes
// on every breath.
func detMedian(vs []float64) float64 {
	n := len(vs)
	if n == 0 {
		return math.NaN()
	}
	return detMedianOfRanks(vs, (n-1)/2, n/2)
}

// detSelect reorders vs so that vs[k] is the k-th smallest value, with
// smaller or equal values before it, and returns vs[k].
//
// It is Floyd and Rivest's SELECT (Floyd RW, Rivest RL, "Algorithm 489:
// SELECT", Commun ACM 1975;18:173): on a long slice it first selects within
// a small sample around the expected rank, so that the partition that
// follows has a pivot close to the k-th value and the range left to search
// is small. It makes about n + min(k, n−k) comparisons, where quickselect
// with a median-of-three pivot makes about 2.75n for a median; the
// pairwise slopes of a Theil–Sen trend (4,560 at 96 breaths) made
// selection the largest cost of the detectors.
func detSelect(vs []float64, k int) float64 {
	detSelectRange(vs, 0, len(vs)-1, k)
	return vs[k]
}

// detSelectMinSample is the range above which detSelectRange narrows the
// range by a sample first (the published algorithm's constant).
const detSelectMinSample = 600

// detSelectRange is detSelect within vs[left..right]; left ≤ k ≤ right.
func detSelectRange(vs []float64, left, right, k int) {
	for right > left {
		if right-left > detSelectMinSample {
			// A sample of about n^(2/3) values around the rank k is
			// selected first, which leaves vs[k] a pivot close to the
			// wanted value (the published constants).
			n := float64(right - left + 1)
			i := float64(k - left + 1)
			z := math.Log(n)
			s := 0.5 * math.Exp(2*z/3)
			sd := 0.5 * math.Sqrt(z*s*(n-s)/n)
			switch {
			case i < n/2:
				sd = -sd
			case i == n/2:
				sd = 0
			}
			newLeft := max(left, int(float64(k)-i*s/n+sd))
			newRight := min(right, int(float64(k)+(n-i)*s/n+sd))
			detSelectRange(vs, newLeft, newRight, k)
		}
		t := vs[k]
		i, j := left, right
		vs[left], vs[k] = vs[k], vs[left]
		if vs[right] > t {
			vs[right], vs[left] = vs[left], vs[right]
		}
		for i < j {
			vs[i], vs[j] = vs[j], vs[i]
			i++
			j--
			for vs[i] < t {
				i++
			}
			for vs[j] > t {
				j--
			}
		}
		if vs[left] == t {
			vs[left], vs[j] = vs[j], vs[left]
		} else {
			j++
			vs[j], vs[right] = vs[right], vs[j]
		}
		if j <= k {
			left = j + 1
		}
		if k <= j {
			right = j - 1
		}
	}
}

// detTheilSen returns the Theil–Sen slope of ys against xs: the median of the
// slopes of all pairs with distinct x (Theil H, 1950; Sen PK, J Am Stat
// Assoc 1968;63:1379). It is robust to up to about 29 % outliers. buf is
// scratch space, returned for reuse; the slope is NaN with fewer than two
// distinct x.
func detTheilSen(xs, ys, buf []float64) (float64, []float64) {
	n := len(xs)
	m0 := n * (n - 1) / 2
	if cap(buf) < m0 {
		buf = make([]float64, m0)
	}
	buf = buf[:m0]
	if m0 >= theilSenBandMin {
		if s, ok := theilSenBand(xs, ys, buf); ok {
			return s, buf[:0]
		}
	}
	m := 0
	for i, xi := range xs {
		yi := ys[i]
		for j := i + 1; j < n; j++ {
			if dx := xs[j] - xi; dx != 0 {
				buf[m] = (ys[j] - yi) / dx
				m++
			}
		}
	}
	return detMedian(buf[:m]), buf[:0]
}

// theilSenBandMin is the number of pairs from which detTheilSen selects
// within a band first (below it the whole selection costs little).
const theilSenBandMin = 256

// theilSenBandSample is the number of pairs whose slopes place the band.
const theilSenBandSample = 256

// theilSenBand is the median pairwise slope found in a band of slopes
// around it, as Floyd and Rivest's SELECT narrows a selection by a sample
// (Floyd RW, Rivest RL, Commun ACM 1975;18:165): the slopes of a sample of
// pairs place a band that holds the median with a margin of four standard
// deviations of the sample's rank, one pass over the pairs counts the
// slopes below it and keeps those in it, and the median is selected among
// those kept. It reports false, leaving the whole selection to the caller,
// when the band missed the middle ranks or a slope is not a number; the
// result is then the exact median either way. buf must hold every pair.
func theilSenBand(xs, ys, buf []float64) (float64, bool) {
	n := len(xs)
	// The sample: pairs drawn by a fixed linear congruential sequence
	// (Knuth's MMIX constants), so that the band and therefore the work
	// never depend on anything but the input.
	var sample [theilSenBandSample]float64
	ns := 0
	state := uint64(0x9e3779b97f4a7c15)
	for range theilSenBandSample {
		state = state*6364136223846793005 + 1442695040888963407
		i := int((state >> 32) * uint64(n) >> 32)
		state = state*6364136223846793005 + 1442695040888963407
		j := int((state >> 32) * uint64(n) >> 32)
		if i > j {
			i, j = j, i
		}
		if dx := xs[j] - xs[i]; i != j && dx != 0 {
			sample[ns] = (ys[j] - ys[i]) / dx
			ns++
		}
	}
	if ns < theilSenBandSample/2 {
		return 0, false
	}
	// The median's rank in the sample is binomial: ns/2 ± √ns/2.
	sd := math.Sqrt(float64(ns)) / 2
	rLo, rHi := int(float64(ns)/2-4*sd), int(float64(ns)/2+4*sd)
	lo, hi := math.Inf(-1), math.Inf(1)
	if rLo > 0 {
		lo = detSelect(sample[:ns], rLo)
	}
	if rHi < ns-1 {
		hi = detSelect(sample[:ns], rHi)
	}
	// Breath times and indices increase, so no pair has dx = 0 and the
	// pass needs no test for it; other input takes the whole selection.
	for i := 1; i < n; i++ {
		if !(xs[i] > xs[i-1]) {
			return 0, false
		}
	}
	below, above, w := 0, 0, 0
	for i := 0; i < n-1; i++ {
		xi, yi := xs[i], ys[i]
		xr := xs[i+1:]
		yr := ys[i+1:]
		yr = yr[:len(xr)]
		for j, xj := range xr {
			s := (yr[j] - yi) / (xj - xi)
			buf[w] = s
			// Counted without branches: which side of the band a
			// slope falls is close to a coin toss near the band.
			lt, gt := b2i(s < lo), b2i(s > hi)
			below += lt
			above += gt
			w += 1 - lt - gt
		}
	}
	m := below + above + w
	kLo, kHi := (m-1)/2, m/2
	if w == 0 || below > kLo || kHi >= below+w || hasNaN(buf[:w]) {
		return 0, false
	}
	return detMedianOfRanks(buf[:w], kLo-below, kHi-below), true
}

// b2i is 1 for true and 0 for false.
func b2i(b bool) int {
	if b {
		return 1
	}
	return 0
}

// hasNaN reports whether vs holds a NaN (a slope of infinite values).
func hasNaN(vs []float64) bool {
	for _, v := range vs {
		if v != v {
			return true
		}
	}
	return false
}

// detMedianOfRanks is the mean of the kLo-th and kHi-th smallest values of
// vs (kHi is kLo or kLo+1), as detMedian takes the middle of a slice.
func detMedianOfRanks(vs []float64, kLo, kHi int) float64 {
	hi := detSelect(vs, kHi)
	if kLo == kHi {
		return hi
	}
	// The lower one is the largest value left of kHi after selection.
	lo := vs[0]
	for _, v := range vs[1:kHi] {
		if v >= lo {
			lo = max(lo, v) // max, not v: +0 over −0 as before
		}
	}
	return (lo + hi) / 2
}
