package plot

import (
	"math"
	"sort"

	"gonum.org/v1/plot/plotter"

	"trapline/analyze"
	"trapline/ingest"
)

// wave is one waveform prepared for drawing: runs of points between gaps
// in the recording (a line across a gap would draw a signal that was not
// there).
type wave [][]plotter.XY

// gapS returns the time between samples beyond which the recording is
// taken to have a gap: five times the median sample interval, and at least
// 0.1 s.
func gapS(ss []ingest.Sample) float64 {
	if len(ss) < 3 {
		return math.Inf(1)
	}
	n := min(len(ss)-1, 1000)
	dts := make([]float64, 0, n)
	for i := 1; i <= n; i++ {
		dts = append(dts, ss[i].TimeS-ss[i-1].TimeS)
	}
	sort.Float64s(dts)
	return math.Max(5*dts[len(dts)/2], 0.1)
}

// sampleRange returns the indices [i, j) of the samples whose time is in
// [fromS, toS]; ss is in time order.
func sampleRange(ss []ingest.Sample, fromS, toS float64) (int, int) {
	i := sort.Search(len(ss), func(k int) bool { return ss[k].TimeS >= fromS })
	j := sort.Search(len(ss), func(k int) bool { return ss[k].TimeS > toS })
	return i, j
}

// decimate turns the samples' values (val) into a wave with at most about
// two points per column of a drawing `columns` wide: when there are more
// samples than that, each column keeps its smallest and its largest sample
// in time order (min/max decimation), so that every peak still shows. Runs
// are split where the recording has a gap. Samples whose value is not
// finite are left out.
func decimate(ss []ingest.Sample, fromS, toS float64, columns int, val func(i int) float64) wave {
	gap := gapS(ss)
	i0, i1 := sampleRange(ss, fromS, toS)
	all := i1-i0 <= 2*columns
	colS := (toS - fromS) / float64(columns)
	var w wave
	var run []plotter.XY
	flush := func() {
		if len(run) > 0 {
			w = append(w, run)
			run = nil
		}
	}
	// The current column's extremes, in sample order.
	col, lo, hi := -1, -1, -1
	emit := func() {
		if lo < 0 {
			return
		}
		a, b := min(lo, hi), max(lo, hi)
		run = append(run, plotter.XY{X: ss[a].TimeS, Y: val(a)})
		if b != a {
			run = append(run, plotter.XY{X: ss[b].TimeS, Y: val(b)})
		}
		lo, hi = -1, -1
	}
	for k := i0; k < i1; k++ {
		if k > i0 && ss[k].TimeS-ss[k-1].TimeS > gap {
			emit()
			flush()
		}
		v := val(k)
		if math.IsNaN(v) || math.IsInf(v, 0) {
			continue
		}
		if all {
			run = append(run, plotter.XY{X: ss[k].TimeS, Y: v})
			continue
		}
		if c := int((ss[k].TimeS - fromS) / colS); c != col {
			emit()
			col = c
		}
		if lo < 0 || v < val(lo) {
			lo = k
		}
		if hi < 0 || v > val(hi) {
			hi = k
		}
	}
	emit()
	flush()
	return w
}

// volumesML returns the volume in mL of every sample: the device's volume
// when it reports one, else the flow integrated by the trapezoidal rule
// from the start of each breath (a new breath starts again at zero), so
// that the trace shows each breath's tidal volume and, with air trapping,
// a curve that does not come back to zero before the next breath. The
// integration also restarts after a gap in the recording.
func volumesML(ss []ingest.Sample, breaths []analyze.Breath) []float64 {
	out := make([]float64, len(ss))
	device := len(ss) > 0
	for i := range ss {
		if math.IsNaN(ss[i].VolumeL) || math.IsInf(ss[i].VolumeL, 0) {
			device = false
			break
		}
	}
	if device {
		for i := range ss {
			out[i] = ss[i].VolumeL * 1000
		}
		return out
	}
	starts := make([]float64, 0, len(breaths))
	for i := range breaths {
		if !math.IsNaN(breaths[i].StartS) {
			starts = append(starts, breaths[i].StartS)
		}
	}
	sort.Float64s(starts)
	gap := gapS(ss)
	next := 0 // the next breath start not yet passed
	volL := 0.0
	for i := range ss {
		t := ss[i].TimeS
		restart := i == 0 || t-ss[i-1].TimeS > gap
		for next < len(starts) && starts[next] <= t {
			next++
			restart = true
		}
		if restart {
			volL = 0
		} else if f0, f1 := ss[i-1].FlowLPS, ss[i].FlowLPS; !math.IsNaN(f0) && !math.IsNaN(f1) {
			volL += (f0 + f1) / 2 * (t - ss[i-1].TimeS)
		}
		out[i] = volL * 1000
	}
	return out
}
