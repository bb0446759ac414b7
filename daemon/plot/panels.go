package plot

import (
	"fmt"
	"image/color"
	"math"
	"strings"

	gp "gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"

	"trapline/alerts/alarmbook"
	"trapline/analyze"
	"trapline/simulator/plotstyle"
)

const timeLabel = "time (s)"

// buildPanels makes the plots of the figure, top to bottom.
func buildPanels(d *Data, o *Options) ([]panel, error) {
	vol := volumesML(d.Samples, d.Breaths)
	var starts []float64
	var eef plotter.XYs
	var ended []*analyze.Breath // breaths that end in the range
	for i := range d.Breaths {
		b := &d.Breaths[i]
		if in(b.StartS, o) {
			starts = append(starts, b.StartS)
		}
		if !in(b.EndS, o) {
			continue
		}
		ended = append(ended, b)
		if finite(b.EndExpFlowLPM) {
			// Expiratory flow is negative on the flow axis (flow into the
			// patient is positive); the record holds its magnitude.
			eef = append(eef, plotter.XY{X: b.EndS, Y: -b.EndExpFlowLPM})
		}
	}
	waves := []struct {
		class, label string
		val          func(i int) float64
		weight       float64
	}{
		{"pressure", "airway pressure\n(cmH2O)", func(i int) float64 { return d.Samples[i].PressureCmH2O }, 3},
		{"flow", "flow (L/min)", func(i int) float64 { return d.Samples[i].FlowLPS * 60 }, 3},
		{"volume", "volume (mL)", func(i int) float64 { return vol[i] }, 2},
	}
	var out []panel
	for k, w := range waves {
		p := newPanel(w.label)
		if k == 0 {
			p.Title.Text = o.Title + "\n" + Caution
		}
		wv := decimate(d.Samples, o.FromS, o.ToS, o.Columns, w.val)
		if err := addWave(p, w.class, wv); err != nil {
			return nil, err
		}
		p.Add(vlines{xs: starts, class: "breath-start " + w.class,
			style: draw.LineStyle{Color: plotstyle.BoundaryGrey, Width: vg.Points(0.5)}})
		if w.class == "flow" && len(eef) > 0 {
			m := dots{xy: eef, colour: plotstyle.Vermilion, radius: vg.Points(1.8), class: "eef"}
			p.Add(m)
			p.Legend.Add("end-expiratory flow", m)
			headroom(p, 0.25, wv, eef)
		}
		out = append(out, panel{p, w.weight})
	}
	for _, t := range []struct {
		class, label string
		get          func(b *analyze.Breath) float64
		colour       color.RGBA
	}{
		{"peepi", "intrinsic PEEP\n(cmH2O)", func(b *analyze.Breath) float64 { return b.PEEPiCmH2O }, plotstyle.BluishGreen},
		{"trapped", "trapped volume\n(mL)", func(b *analyze.Breath) float64 { return b.TrappedML }, plotstyle.ReddishPurple},
	} {
		p, err := trendPanel(t.label, t.class, trend(ended, t.get), t.colour)
		if err != nil {
			return nil, err
		}
		out = append(out, panel{p, 2})
	}
	ap, n := alarmPanel(d, o)
	out = append(out, panel{ap, 2 + 0.35*float64(max(n, 1))})
	for _, p := range out {
		p.p.X.Min, p.p.X.Max = o.FromS, o.ToS
	}
	return out, nil
}

func in(t float64, o *Options) bool { return t >= o.FromS && t <= o.ToS }

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

func newPanel(ylabel string) *gp.Plot {
	p := plotstyle.NewPlot("", timeLabel, ylabel)
	p.X.Tick.Marker, p.Y.Tick.Marker = plainTicks{}, plainTicks{}
	p.Legend.Top = true
	p.Legend.TextStyle.Font.Size = vg.Points(9)
	return p
}

// chunkPoints is the most points of one drawn line. A dense waveform drawn
// as one long path is slow to rasterise (the rasteriser's cost grows with
// the cells one path covers, faster than linearly), so each run is drawn
// in pieces that share their end points.
const chunkPoints = 32

// addWave adds the runs of the wave as lines of one class.
func addWave(p *gp.Plot, class string, w wave) error {
	for _, run := range w {
		for i := 0; i < len(run); i += chunkPoints {
			piece := run[i:min(i+chunkPoints+1, len(run))]
			if len(piece) < 2 && i > 0 {
				break
			}
			l, err := plotter.NewLine(plotter.XYs(piece))
			if err != nil {
				return fmt.Errorf("%s line: %w", class, err)
			}
			l.Color = plotstyle.Blue
			l.Width = vg.Points(0.8)
			p.Add(tagged{l, class})
		}
	}
	return nil
}

// headroom sets the y axis to the span of the wave and the points plus
// frac of it on top, so that the legend at the top does not hide the data.
func headroom(p *gp.Plot, frac float64, w wave, pts plotter.XYs) {
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, run := range append(w, pts) {
		for _, pt := range run {
			lo, hi = math.Min(lo, pt.Y), math.Max(hi, pt.Y)
		}
	}
	if hi > lo {
		p.Y.Min, p.Y.Max = lo, hi+frac*(hi-lo)
	}
}

// trendGapS is the time between one breath's end and the next one's start
// beyond which a trend line is broken: the breaths did not follow each
// other (a gap in the recording, or breaths the analysis left out).
const trendGapS = 0.5

// trend returns one breath value as runs of points at the breaths' ends,
// broken where a breath has no value or the breaths do not follow each
// other.
func trend(breaths []*analyze.Breath, get func(*analyze.Breath) float64) []plotter.XYs {
	var runs []plotter.XYs
	var run plotter.XYs
	prevEnd := math.NaN()
	for _, b := range breaths {
		v := get(b)
		if !finite(v) || !(b.StartS-prevEnd <= trendGapS) {
			if len(run) > 0 {
				runs = append(runs, run)
			}
			run = nil
		}
		prevEnd = b.EndS
		if finite(v) {
			run = append(run, plotter.XY{X: b.EndS, Y: v})
		}
	}
	if len(run) > 0 {
		runs = append(runs, run)
	}
	return runs
}

// trendPanel draws one value per breath: lines through the runs of
// breaths and a point at each breath.
func trendPanel(label, class string, runs []plotter.XYs, c color.RGBA) (*gp.Plot, error) {
	p := newPanel(label)
	var all plotter.XYs
	for _, run := range runs {
		all = append(all, run...)
		if len(run) < 2 {
			continue
		}
		l, err := plotter.NewLine(run)
		if err != nil {
			return nil, fmt.Errorf("%s trend: %w", class, err)
		}
		l.Color, l.Width = plotstyle.WithAlpha(c, 140), vg.Points(0.8)
		p.Add(tagged{l, class + "-line"})
	}
	if len(all) == 0 {
		p.Title.Text = strings.ReplaceAll(label, "\n", " ") + ": no breath in range has a value"
		return p, nil
	}
	p.Add(dots{xy: all, colour: c, radius: vg.Points(1.3), class: class})
	return p, nil
}

// alarmPanel draws each alarm that overlaps the range as a band on its
// condition's row, from its raise to its clearing (to the end of the range
// while it is open), in stretches coloured by priority, with one outline
// per alarm. It returns the plot and the number of rows.
func alarmPanel(d *Data, o *Options) (*gp.Plot, int) {
	p := newPanel("")
	book := alarmbook.New()
	for i := range d.Alerts {
		book.Apply(&d.Alerts[i])
	}
	row := map[string]int{}
	var names []string
	var bs bands
	edge := draw.LineStyle{Color: color.Gray{Y: 60}, Width: vg.Points(0.6)}
	for _, a := range book.Alarms() {
		from, to := a.Span(o.ToS)
		if to < o.FromS || from > o.ToS {
			continue
		}
		r, ok := row[a.Condition]
		if !ok {
			r = len(names)
			row[a.Condition] = r
			names = append(names, a.Condition)
		}
		y0, y1 := float64(r)-0.32, float64(r)+0.32
		for _, s := range a.Segments(o.ToS) {
			lo, hi := math.Max(s.FromS, o.FromS), math.Min(s.ToS, o.ToS)
			if hi < lo {
				continue
			}
			bs = append(bs, band{x0: lo, x1: hi, y0: y0, y1: y1, fill: priorityColour(string(s.Priority)),
				class: "alarm-segment priority-" + string(s.Priority)})
		}
		bs = append(bs, band{x0: math.Max(from, o.FromS), x1: math.Min(to, o.ToS), y0: y0, y1: y1, line: edge, class: "alarm"})
		for _, st := range a.Steps {
			if st.Kind == alarmbook.Acknowledged && in(st.TS, o) {
				// An acknowledgement: a narrow dark bar across the band.
				bs = append(bs, band{x0: st.TS, x1: st.TS, y0: y0 - 0.1, y1: y1 + 0.1, fill: color.Gray{Y: 30}, class: "alarm-ack"})
			}
		}
	}
	if len(names) == 0 {
		p.Title.Text = "alarms: none in range"
		p.NominalY("")
		return p, 0
	}
	p.Title.Text = "alarms (raised to cleared, by priority; dark bar: acknowledged)"
	p.Add(bs)
	p.NominalY(names...)
	// Room above the rows for the priority key.
	p.Y.Min, p.Y.Max = -0.6, float64(len(names))-0.4+1.6
	for _, pr := range []string{"high", "medium", "low"} {
		p.Legend.Add(pr, swatch{priorityColour(pr)})
	}
	return p, len(names)
}

// priorityColour is the band colour of a priority; an unknown one is grey.
func priorityColour(p string) color.Color {
	if c, ok := plotstyle.Priority[p]; ok {
		return c
	}
	return color.Gray{Y: 150}
}

// plainTicks are gonum/plot's default ticks with the labels' trailing zeros
// dropped ("250" rather than "250.00").
type plainTicks struct{}

// Ticks returns the default ticks with plain labels.
func (plainTicks) Ticks(lo, hi float64) []gp.Tick {
	ts := gp.DefaultTicks{}.Ticks(lo, hi)
	for i := range ts {
		if l := ts[i].Label; strings.Contains(l, ".") && !strings.ContainsAny(l, "eE") {
			ts[i].Label = strings.TrimSuffix(strings.TrimRight(l, "0"), ".")
		}
	}
	return ts
}
