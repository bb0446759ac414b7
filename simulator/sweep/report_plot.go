package sweep

import (
	"bytes"
	"fmt"
	"image/color"
	"math"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/simulator/plotstyle"
)

func colour(i int) color.RGBA { return plotstyle.Colour(i) }

func withAlpha(c color.RGBA, a uint8) color.NRGBA { return plotstyle.WithAlpha(c, a) }

// svgOf renders plots side by side (or stacked, with rows > 1) into one
// inline SVG element.
func svgOf(w, h vg.Length, rows int, plots ...*plot.Plot) (string, error) {
	c := vgsvg.New(w, h)
	dc := draw.New(c)
	if len(plots) == 1 {
		plots[0].Draw(dc)
	} else {
		cols := (len(plots) + rows - 1) / rows
		tiles := draw.Tiles{Rows: rows, Cols: cols, PadX: vg.Millimeter * 4, PadY: vg.Millimeter * 3}
		grid := make([][]*plot.Plot, rows)
		for i := range grid {
			grid[i] = make([]*plot.Plot, cols)
		}
		for i, p := range plots {
			grid[i/cols][i%cols] = p
		}
		canv := plot.Align(grid, tiles, dc)
		for i, p := range plots {
			p.Draw(canv[i/cols][i%cols])
		}
	}
	var buf bytes.Buffer
	if _, err := c.WriteTo(&buf); err != nil {
		return "", fmt.Errorf("render svg: %w", err)
	}
	s := buf.String()
	if i := bytes.Index(buf.Bytes(), []byte("<svg")); i > 0 {
		s = s[i:]
	}
	return s, nil
}

func newPlot(title, x, y string) *plot.Plot { return plotstyle.NewPlot(title, x, y) }

// vline draws a dashed vertical line at x from y0 to y1.
func vline(p *plot.Plot, x, y0, y1 float64, c color.Color, dashed bool) error {
	l, err := plotter.NewLine(plotter.XYs{{X: x, Y: y0}, {X: x, Y: y1}})
	if err != nil {
		return err
	}
	l.Color = c
	l.Width = vg.Points(1)
	if dashed {
		l.Dashes = []vg.Length{vg.Points(4), vg.Points(3)}
	}
	p.Add(l)
	return nil
}

// curveLine turns the bins of a detection curve into points at the bin
// midpoints, leaving out empty bins.
func curveLine(bins []CurveBin) plotter.XYs {
	var xy plotter.XYs
	for _, b := range bins {
		if b.Breaths == 0 {
			continue
		}
		xy = append(xy, plotter.XY{X: (float64(b.Lo) + float64(b.Hi)) / 2, Y: float64(b.Fraction)})
	}
	return xy
}

func addLinePoints(p *plot.Plot, name string, xy plotter.XYs, c color.RGBA, dashed bool) error {
	if len(xy) == 0 {
		return nil
	}
	l, s, err := plotter.NewLinePoints(xy)
	if err != nil {
		return err
	}
	l.Color, s.Color = c, c
	l.Width = vg.Points(1.5)
	if dashed {
		l.Dashes = []vg.Length{vg.Points(5), vg.Points(3)}
	}
	s.Radius = vg.Points(2.5)
	p.Add(l, s)
	p.Legend.Add(name, l, s)
	return nil
}

// curvePlot draws the fraction of breaths alarmed against the true
// quantity of one condition: by model for one set, or overall for each set
// when comparing.
func curvePlot(sum *Summary, cond, title, xlabel string) (*plot.Plot, error) {
	p := newPlot(title, xlabel, "fraction of breaths alarmed")
	p.Y.Min, p.Y.Max = 0, 1.05
	p.Legend.Top = false // the curves rise to the top right
	ci := indexOf(Scored(), cond)
	if len(sum.Sets) > 1 {
		for si, s := range sum.Sets {
			if err := addLinePoints(p, s.Name, curveLine(s.Conditions[ci].Curve), colour(si), si > 0); err != nil {
				return nil, err
			}
		}
	} else {
		for mi, m := range sum.Sets[0].ByModel {
			if err := addLinePoints(p, m.Model, curveLine(m.Conditions[ci].Curve), colour(mi), false); err != nil {
				return nil, err
			}
		}
		if err := addLinePoints(p, "all", curveLine(sum.Sets[0].Conditions[ci].Curve), colour(6), true); err != nil {
			return nil, err
		}
	}
	if cs := curveFor(cond); cs != nil {
		if err := vline(p, cs.threshold, 0, 1.05, color.Gray{Y: 90}, true); err != nil {
			return nil, err
		}
	}
	return p, nil
}

// histPlot draws latency histograms, one per set, overlaid.
func histPlot(title string, data [][]float64, names []string) (*plot.Plot, error) {
	p := newPlot(title, "latency (s)", "episodes")
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, d := range data {
		for _, x := range d {
			lo, hi = math.Min(lo, x), math.Max(hi, x)
		}
	}
	if math.IsInf(lo, 0) {
		p.Title.Text += " (no episodes)"
		return p, nil
	}
	// A tail of late episodes would squash the rest into one bin: the last
	// bin gathers everything beyond three times the upper quartile's
	// distance from the smallest latency.
	var all []float64
	for _, d := range data {
		all = append(all, d...)
	}
	if cut := lo + 3*(float64(quantile(all, 0.75))-lo); cut < hi && cut > lo {
		hi = cut
		p.Title.Text += fmt.Sprintf(" (last bin: ≥ %.0f s)", hi)
	}
	if hi-lo < 1 {
		hi = lo + 1
	}
	const nBins = 20
	width := (hi - lo) / nBins
	for i, d := range data {
		if len(d) == 0 {
			continue
		}
		counts := make(plotter.XYs, nBins)
		for k := range counts {
			counts[k].X = lo + (float64(k)+0.5)*width
		}
		for _, x := range d {
			k := max(min(int((x-lo)/width), nBins-1), 0)
			counts[k].Y++
		}
		h, err := plotter.NewHistogram(counts, nBins)
		if err != nil {
			return nil, err
		}
		h.FillColor = withAlpha(colour(i), 110)
		h.LineStyle.Color = colour(i)
		p.Add(h)
		p.Legend.Add(names[i], h)
	}
	return p, nil
}

// latencyScatter draws the onset latency of each episode against the
// episode's median true quantity, one colour per set.
func latencyScatter(sum *Summary, cond, title, xlabel string) (*plot.Plot, error) {
	p := newPlot(title, xlabel, "onset latency (s)")
	ci := indexOf(Scored(), cond)
	// Late outliers are drawn at a cap (three times the upper quartile) so
	// that they do not flatten the rest.
	var all []float64
	for si := range sum.Sets {
		all = append(all, sum.Sets[si].Conditions[ci].onsetS...)
	}
	capS := math.Inf(1)
	if len(all) > 0 {
		capS = math.Max(3*float64(quantile(all, 0.75)), 1)
		p.Title.Text += fmt.Sprintf(" (drawn at most %.0f s)", capS)
	}
	for si, s := range sum.Sets {
		c := &s.Conditions[ci]
		xy := make(plotter.XYs, 0, len(c.onsetQ))
		for i := range c.onsetQ {
			xy = append(xy, plotter.XY{X: c.onsetQ[i], Y: math.Min(c.onsetS[i], capS)})
		}
		if len(xy) == 0 {
			continue
		}
		sc, err := plotter.NewScatter(xy)
		if err != nil {
			return nil, err
		}
		sc.Color = withAlpha(colour(si), 150)
		sc.Radius = vg.Points(2)
		p.Add(sc)
		p.Legend.Add(s.Name, sc)
	}
	return p, nil
}

// errorCurvePlot draws the median relative error with its interquartile
// range over bins of the true quantity, one line per model.
func errorCurvePlot(curves []ErrorCurve, title, xlabel string) (*plot.Plot, error) {
	p := newPlot(title, xlabel, "relative error (%): median, IQR")
	for mi, c := range curves {
		var xy plotter.XYs
		var yerr plotter.YErrors
		for _, b := range c.Bins {
			if b.N == 0 {
				continue
			}
			hi := float64(b.Hi)
			if hi > 500 {
				hi = float64(b.Lo) * 1.3
			}
			x := (float64(b.Lo)+hi)/2 + float64(mi-len(curves)/2)*0.4
			xy = append(xy, plotter.XY{X: x, Y: float64(b.MedianRelPct)})
			yerr = append(yerr, struct{ Low, High float64 }{float64(b.MedianRelPct - b.P25RelPct), float64(b.P75RelPct - b.MedianRelPct)})
		}
		if len(xy) == 0 {
			continue
		}
		if err := addLinePoints(p, c.Model, xy, colour(mi), false); err != nil {
			return nil, err
		}
		eb, err := plotter.NewYErrorBars(struct {
			plotter.XYer
			plotter.YErrorer
		}{xy, yerr})
		if err != nil {
			return nil, err
		}
		eb.Color = colour(mi)
		p.Add(eb)
	}
	return p, nil
}

// distributionPlot draws, for one estimated quantity, the median error of
// each patient model with bars from the 5th to the 95th percentile.
func distributionPlot(est []EstimatorError, quantity, title, ylabel string, relative bool) (*plot.Plot, error) {
	p := newPlot(title, "", ylabel)
	var names []string
	for _, e := range est {
		if e.Quantity != quantity {
			continue
		}
		med, lo, hi := e.Median, e.P05, e.P95
		if relative {
			med, lo, hi = e.MedianRelPct, e.P05RelPct, e.P95RelPct
		}
		if math.IsNaN(float64(med)) {
			continue
		}
		x := float64(len(names))
		names = append(names, shortModel(e.Model))
		xy := plotter.XYs{{X: x, Y: float64(med)}}
		bars := plotter.YErrors{{Low: float64(med - lo), High: float64(hi - med)}}
		eb, err := plotter.NewYErrorBars(struct {
			plotter.XYer
			plotter.YErrorer
		}{xy, bars})
		if err != nil {
			return nil, err
		}
		c := colour(len(names) - 1)
		eb.Color, eb.Width, eb.CapWidth = c, vg.Points(2), vg.Points(10)
		sc, err := plotter.NewScatter(xy)
		if err != nil {
			return nil, err
		}
		sc.Color, sc.Radius = c, vg.Points(3.5)
		p.Add(eb, sc)
	}
	p.NominalX(names...)
	p.X.Min, p.X.Max = -0.6, float64(len(names))-0.4
	return p, nil
}

// shortModel abbreviates a model name for a crowded axis.
func shortModel(m string) string {
	switch m {
	case ModelTwoCompartment:
		return "2-comp."
	case ModelFlowLimited:
		return "flow-lim."
	case ModelScenario:
		return "scen."
	}
	return m
}

// waveformPlots draws the example patient: pressure and flow with the
// analysed breath starts, the breaths that truly trap air, and the alert
// events of the first set.
func waveformPlots(ex *Example) (*plot.Plot, *plot.Plot, error) {
	pp := newPlot(fmt.Sprintf("example: %s", ex.Case), "time (s)", "airway pressure (cmH2O)")
	fp := newPlot("", "time (s)", "flow (L/min)")
	pres := make(plotter.XYs, len(ex.rec.samples))
	flow := make(plotter.XYs, len(ex.rec.samples))
	pMin, pMax, fMin, fMax := math.Inf(1), math.Inf(-1), math.Inf(1), math.Inf(-1)
	for i, s := range ex.rec.samples {
		pres[i] = plotter.XY{X: s.TimeS, Y: s.PressureCmH2O}
		flow[i] = plotter.XY{X: s.TimeS, Y: s.FlowLPS * 60}
		pMin, pMax = math.Min(pMin, s.PressureCmH2O), math.Max(pMax, s.PressureCmH2O)
		fMin, fMax = math.Min(fMin, s.FlowLPS*60), math.Max(fMax, s.FlowLPS*60)
	}
	if len(pres) == 0 {
		return nil, nil, fmt.Errorf("example %s: no samples recorded", ex.Case)
	}
	pMin, fMin = pMin-2, fMin-5
	pMax, fMax = pMax+6, fMax+5
	if err := trappingBands(ex, pp, fp, pMin, pMax, fMin, fMax); err != nil {
		return nil, nil, err
	}
	// Analysed breath starts.
	for _, b := range ex.rec.breaths {
		for _, x := range []struct {
			p      *plot.Plot
			lo, hi float64
		}{{pp, pMin, pMax}, {fp, fMin, fMax}} {
			if err := vline(x.p, b.StartS, x.lo, x.hi, plotstyle.BoundaryGrey, false); err != nil {
				return nil, nil, err
			}
		}
	}
	for _, x := range []struct {
		p  *plot.Plot
		xy plotter.XYs
	}{{pp, pres}, {fp, flow}} {
		l, err := plotter.NewLine(x.xy)
		if err != nil {
			return nil, nil, err
		}
		l.Color = colour(0)
		l.Width = vg.Points(1)
		x.p.Add(l)
	}
	if err := alertMarks(ex, pp, fp, pMin, pMax, fMin, fMax); err != nil {
		return nil, nil, err
	}
	for _, x := range []*plot.Plot{pp, fp} {
		x.X.Min, x.X.Max = ex.FromS, ex.ToS
	}
	pp.Y.Min, pp.Y.Max = pMin, pMax
	fp.Y.Min, fp.Y.Max = fMin, fMax
	return pp, fp, nil
}

// trappingBands marks the breaths of the example that truly trap air with
// a band along the bottom of both plots, whose axes span pMin–pMax and
// fMin–fMax.
func trappingBands(ex *Example, pp, fp *plot.Plot, pMin, pMax, fMin, fMax float64) error {
	// Breaths that truly trap air: a band along the bottom of both plots.
	for _, t := range ex.Truth {
		if !t.Has(indexOf(Scored(), analyze.CondAirTrapping)) || t.EndS < ex.FromS || t.StartS > ex.ToS {
			continue
		}
		for _, band := range []struct {
			p      *plot.Plot
			lo, hi float64
		}{{pp, pMin, pMin + 0.04*(pMax-pMin)}, {fp, fMin, fMin + 0.04*(fMax-fMin)}} {
			poly, err := plotter.NewPolygon(plotter.XYs{
				{X: math.Max(t.StartS, ex.FromS), Y: band.lo}, {X: math.Min(t.EndS, ex.ToS), Y: band.lo},
				{X: math.Min(t.EndS, ex.ToS), Y: band.hi}, {X: math.Max(t.StartS, ex.FromS), Y: band.hi}})
			if err != nil {
				return err
			}
			poly.Color = withAlpha(colour(3), 160)
			poly.LineStyle.Width = 0
			band.p.Add(poly)
		}
	}
	return nil
}

// alertMarks marks the alert events of the example on both plots, whose
// axes span pMin–pMax and fMin–fMax, and labels them on the pressure plot.
func alertMarks(ex *Example, pp, fp *plot.Plot, pMin, pMax, fMin, fMax float64) error {
	// Alert events.
	var lxy plotter.XYs
	var ltext []string
	for _, e := range ex.Alerts {
		if e.TS < ex.FromS || e.TS > ex.ToS {
			continue
		}
		c := colour(1)
		if e.State == string(alerts.Cleared) {
			c = colour(2)
		}
		for _, x := range []struct {
			p      *plot.Plot
			lo, hi float64
		}{{pp, pMin, pMax}, {fp, fMin, fMax}} {
			if err := vline(x.p, e.TS, x.lo, x.hi, c, true); err != nil {
				return err
			}
		}
		lxy = append(lxy, plotter.XY{X: e.TS, Y: pMax - 1.5 - float64(len(lxy)%3)*1.6})
		ltext = append(ltext, e.Condition+" "+e.State)
	}
	if len(lxy) > 0 {
		lb, err := plotter.NewLabels(plotter.XYLabels{XYs: lxy, Labels: ltext})
		if err != nil {
			return err
		}
		for i := range lb.TextStyle {
			lb.TextStyle[i].Color = colour(1)
		}
		pp.Add(lb)
	}
	return nil
}

func indexOf(xs []string, x string) int {
	for i, v := range xs {
		if v == x {
			return i
		}
	}
	return -1
}
