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
// smaller or equal values before it, and returns vs[k] (Hoare's
// quickselect with a median-of-three pivot, expected linear time).
func detSelect(vs []float64, k int) float64 {
	lo, hi := 0, len(vs)-1
	for lo < hi {
		// Median of three as the pivot avoids the quadratic case on sorted
		// input, which trends produce.
		mid := lo + (hi-lo)/2
		if vs[mid] < vs[lo] {
			vs[mid], vs[lo] = vs[lo], vs[mid]
		}
		if vs[hi] < vs[lo] {
			vs[hi], vs[lo] = vs[lo], vs[hi]
		}
		if vs[hi] < vs[mid] {
			vs[hi], vs[mid] = vs[mid], vs[hi]
		}
		pivot := vs[mid]
		i, j := lo, hi
		for i <= j {
			for vs[i] < pivot {
				i++
			}
			for vs[j] > pivot {
				j--
			}
			if i <= j {
				vs[i], vs[j] = vs[j], vs[i]
				i++
				j--
			}
		}
		switch {
		case k <= j:
			hi = j
		case k >= i:
			lo = i
		default:
			return vs[k]
		}
	}
	return vs[k]
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
// within a band first: below about 70 breaths (2,415 pairs) the slopes fit
// the first-level cache and quickselect over all of them is as fast as the
// band with its sample (measured, 3 December 2026: 1.7–1.8, 4.2–4.6 and
// 10.7 µs at 30, 50 and 70 breaths either way; at 96 breaths 14–17 µs in
// the band against 23–26 µs).
const theilSenBandMin = 2500

// theilSenBandSample is the number of pairs whose slopes place the band.
const theilSenBandSample = 256

// theilSenBand is the median pairwise slope found in a band of slopes
// around it, as Floyd and Rivest narrow a selection by a sample (Floyd RW,
// Rivest RL, "Expected time bounds for selection", Commun ACM
// 1975;18:165): the slopes of a sample of pairs place a band that holds
// the median with a margin of four standard deviations of the sample's
// rank, one pass over the pairs counts the slopes below it and keeps those
// in it, and the median is selected among those kept. It reports false,
// leaving the whole selection to the caller, when the band missed the
// middle ranks, a time repeats or a slope is not a number; the result is
// then the exact median either way. buf must hold every pair.
func theilSenBand(xs, ys, buf []float64) (float64, bool) {
	n := len(xs)
	// Breath times and indices increase, so no pair has dx = 0 and neither
	// the sample nor the pass needs a test for it; other input takes the
	// whole selection.
	for i := 1; i < n; i++ {
		if !(xs[i] > xs[i-1]) {
			return 0, false
		}
	}
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
		if i != j {
			sample[ns] = (ys[j] - ys[i]) / (xs[j] - xs[i])
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
