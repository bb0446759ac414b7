package analyze

import "math"

// ringSize is the most raw samples kept for the end-of-phase windows
// (plateau, end-expiratory pressure and flow, the onset of the rise):
// about one second at 1000 Hz, enough for the longest window plus the
// confirmation delay.
const ringSize = 1024

// ringMin is the capacity a ring starts with. It grows, doubling up to
// ringSize, only while a full ring spans less than its keep time, so a
// 100 Hz stream holds 256 samples (6 KiB) rather than 1024 (24 KiB): with
// thousands of streams in one process the rings were a third of the memory
// of a stream.
const ringMin = 64

// rawSample is one accepted sample in the ring.
type rawSample struct{ t, p, f float64 }

// ring keeps the last len(s) samples; it allocates only when it grows.
type ring struct {
	s     []rawSample
	mask  int     // len(s) - 1 (a power of two)
	next  int     // index of the next write
	n     int     // number of valid entries
	keepS float64 // the span a full ring must cover before it stops growing
}

func newRing(keepS float64) ring {
	return ring{s: make([]rawSample, ringMin), mask: ringMin - 1, keepS: keepS}
}

func (r *ring) reset() { r.next, r.n = 0, 0 }

// push writes a sample. The caller first calls lap when next is 0 (see
// Analyzer.push): a check inside push would keep it from being inlined
// where it runs for every sample.
func (r *ring) push(t, p, f float64) {
	r.s[r.next] = rawSample{t, p, f}
	r.next = (r.next + 1) & r.mask
	if r.n <= r.mask {
		r.n++
	}
}

// lap grows a full ring whose oldest sample (slot 0, about to be
// overwritten) is less than keepS older than t: once a lap, so growing
// costs one predictable branch per sample. Out of line: it runs once a lap.
//
//go:noinline
func (r *ring) lap(t float64) {
	if r.n > r.mask && r.mask < ringSize-1 && t-r.s[0].t < r.keepS {
		r.grow()
	}
}

// grow doubles a full ring, keeping its samples in order.
func (r *ring) grow() {
	s := make([]rawSample, 2*len(r.s))
	k := copy(s, r.s[r.next:])
	copy(s[k:], r.s[:r.next])
	r.s, r.mask, r.next = s, len(s)-1, len(r.s)
}

// at returns the k-th newest sample (1: the newest); k <= r.n.
func (r *ring) at(k int) *rawSample { return &r.s[(r.next-k)&r.mask] }

// endWindow is window for the end of expiration: when [from, to) holds
// fewer than three samples (at 25 Hz a 0.1 s window holds two or three),
// the standard error of the extrapolated flow, which needs three, is that
// of the same line fitted over the last three samples before to; the mean
// pressure and the flow stay those of the window.
func (r *ring) endWindow(from, to float64) (meanP, flowAtTo, seFlow float64, count int) {
	meanP, flowAtTo, seFlow, count = r.window(from, to)
	if count == 0 || count >= 3 {
		return meanP, flowAtTo, seFlow, count
	}
	k := 0
	for i := 1; i <= r.n; i++ {
		if e := r.at(i); e.t < to {
			if k++; k == 3 {
				if _, _, se, n := r.window(e.t, to); n == 3 {
					seFlow = se
				}
				break
			}
		}
	}
	return meanP, flowAtTo, seFlow, count
}

// window returns the mean pressure and the count of the samples with time in
// [from, to), and, when at least two are present, the flow at time `to`
// extrapolated by a straight-line fit over them (else the last flow), with
// the standard error of that extrapolation (NaN below three samples).
func (r *ring) window(from, to float64) (meanP, flowAtTo, seFlow float64, count int) {
	var sp, st, sf, stt, stf, sff float64
	lastF := 0.0
	for k := 1; k <= r.n; k++ {
		e := r.at(k)
		if e.t >= to {
			continue
		}
		if e.t < from {
			break
		}
		if count == 0 {
			lastF = e.f
		}
		count++
		dt := e.t - to
		sp += e.p
		st += dt
		sf += e.f
		stt += dt * dt
		stf += dt * e.f
		sff += e.f * e.f
	}
	seFlow = math.NaN()
	if count == 0 {
		return 0, 0, seFlow, 0
	}
	n := float64(count)
	meanP = sp / n
	ctt := stt - st*st/n
	if count < 2 || !(ctt > 0) {
		return meanP, lastF, seFlow, count
	}
	ctf := stf - st*sf/n
	slope := ctf / ctt
	flowAtTo = (sf - slope*st) / n
	if count >= 3 {
		ss := math.Max(0, sff-sf*sf/n-slope*ctf)
		mt := st / n
		seFlow = math.Sqrt(ss/(n-2)) * math.Sqrt(1/n+mt*mt/ctt)
	}
	return meanP, flowAtTo, seFlow, count
}

// bufCap is the number of points the decimated breath buffer holds.
const bufCap = 256

// point is one decimated point of a breath: means of time, flow, volume
// since the start of the breath, and pressure over its bin.
type point struct{ t, f, v, p float64 }

// decimator keeps a bounded, evenly decimated copy of the current breath for
// the computations that need the whole breath after it ends (the
// flow–volume fit of the time constant over 25–75 % of the exhaled volume,
// whose limits are known only at the end, and the residual pattern of the
// mechanics fit). Samples are averaged into bins of `stride` samples; when
// the buffer fills, neighbouring bins are averaged pairwise and the stride
// doubles. Memory is fixed (bufCap points), work is O(1) amortised per
// sample, and a breath of any length keeps between bufCap/2 and bufCap
// points. Bin means preserve the linear relations the fits rely on.
type decimator struct {
	pts    [bufCap]point
	n      int
	stride int
	acc    point
	accN   int
	inv    float64 // 1/stride: a bin is emitted when it holds stride samples
}

func (d *decimator) reset() {
	d.n, d.stride, d.accN, d.inv = 0, 1, 0, 1
	d.acc = point{}
}

func (d *decimator) add(t, f, v, p float64) {
	if d.stride == 1 && d.n < bufCap-1 {
		// A bin of one sample: its mean is the sample itself. 0+x, not
		// x, so that a −0 becomes +0 as the sum starting from zero makes
		// it, and the points are the same as through the sums.
		d.pts[d.n] = point{0 + t, 0 + f, 0 + v, 0 + p}
		d.n++
		return
	}
	d.acc.t += t
	d.acc.f += f
	d.acc.v += v
	d.acc.p += p
	d.accN++
	if d.accN < d.stride {
		return
	}
	k := d.inv // 1/float64(d.accN), computed once a stride
	d.pts[d.n] = point{d.acc.t * k, d.acc.f * k, d.acc.v * k, d.acc.p * k}
	d.n++
	d.acc = point{}
	d.accN = 0
	if d.n < bufCap {
		return
	}
	for i := 0; i < bufCap/2; i++ {
		a, b := &d.pts[2*i], &d.pts[2*i+1]
		d.pts[i] = point{(a.t + b.t) / 2, (a.f + b.f) / 2, (a.v + b.v) / 2, (a.p + b.p) / 2}
	}
	d.n = bufCap / 2
	d.stride *= 2
	d.inv = 1 / float64(d.stride)
}
