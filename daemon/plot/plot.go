// Package plot draws a recording of one stream as a figure (SVG or PNG):
// pressure, flow and volume against time with every breath's start and
// end-expiratory flow marked, the intrinsic PEEP and trapped volume of each
// breath as trends beneath, and the alarms as bands coloured by priority.
// The panels share the time axis; every axis names its unit.
//
// In the SVG each element of interest carries a class: the waveforms
// (pressure, flow, volume), the breath starts (breath-start, with the
// panel's name), the end-expiratory flow points (eef), the trend points
// (peepi, trapped) and lines (…-line), and the alarm bands (alarm for the
// outline of one alarm, alarm-segment with priority-high|medium|low for
// its stretches at one priority, alarm-ack for an acknowledgement).
package plot

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"strings"

	gp "gonum.org/v1/plot"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
	"gonum.org/v1/plot/vg/vgsvg"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
)

// Data is what is drawn: one stream's samples (in time order), its breath
// records and its alert events (in the order they were published).
type Data struct {
	Stream  string
	Samples []ingest.Sample
	Breaths []analyze.Breath
	Alerts  []alerts.Event
}

// Select returns the data of one stream out of records of many: breaths and
// alert events whose stream is stream (or has none). The samples are taken
// as they are: a recording holds one stream.
func Select(stream string, samples []ingest.Sample, breaths []analyze.Breath, events []alerts.Event) Data {
	d := Data{Stream: stream, Samples: samples}
	for i := range breaths {
		if breaths[i].Stream == stream || breaths[i].Stream == "" {
			d.Breaths = append(d.Breaths, breaths[i])
		}
	}
	for i := range events {
		if events[i].Stream == stream || events[i].Stream == "" {
			d.Alerts = append(d.Alerts, events[i])
		}
	}
	return d
}

// Options shape the figure.
type Options struct {
	// FromS and ToS bound the time range on the stream's clock, in
	// seconds. ToS 0 means to the end of the recording, and FromS 0 with it
	// from its start; otherwise ToS must be after FromS.
	FromS, ToS float64
	// Width and Height of the figure; zero means 200 mm × 280 mm.
	Width, Height vg.Length
	// Title heads the figure; empty means the stream and the range.
	Title string
	// Columns is the horizontal resolution the waveforms are decimated to
	// (min/max per column); zero means 1200. Breath marks are never
	// decimated.
	Columns int
	// DPI of a PNG; zero means 150.
	DPI int
}

// Formats are the output formats Recording writes.
var Formats = []string{"svg", "png"}

// ErrNoData is returned when the time range holds nothing to draw.
var ErrNoData = errors.New("nothing to plot in the time range")

// Caution is printed on every figure.
const Caution = "research use only; not a medical device; does not replace the ventilator's own alarms"

// Recording draws data in format ("svg" or "png") to w.
func Recording(w io.Writer, format string, data Data, opts Options) error {
	format = strings.ToLower(format)
	if format != "svg" && format != "png" {
		return fmt.Errorf("plot format %q: want one of %v", format, Formats)
	}
	opts, err := resolve(data, opts)
	if err != nil {
		return err
	}
	panels, err := buildPanels(&data, &opts)
	if err != nil {
		return err
	}
	if format == "png" {
		c := vgimg.PngCanvas{Canvas: vgimg.NewWith(vgimg.UseWH(opts.Width, opts.Height), vgimg.UseDPI(opts.DPI))}
		drawPanels(draw.New(c), panels)
		if _, err := c.WriteTo(w); err != nil {
			return fmt.Errorf("write png: %w", err)
		}
		return nil
	}
	svg := vgsvg.New(opts.Width, opts.Height)
	tc := newTagCanvas(svg)
	drawPanels(draw.NewCanvas(tc, opts.Width, opts.Height), panels)
	var buf bytes.Buffer
	if _, err := svg.WriteTo(&buf); err != nil {
		return fmt.Errorf("render svg: %w", err)
	}
	if _, err := w.Write(tc.classify(buf.Bytes())); err != nil {
		return fmt.Errorf("write svg: %w", err)
	}
	return nil
}

// resolve fills the defaults and the time range, and checks them.
func resolve(data Data, opts Options) (Options, error) {
	if opts.Width == 0 {
		opts.Width = 200 * vg.Millimeter
	}
	if opts.Height == 0 {
		opts.Height = 280 * vg.Millimeter
	}
	if opts.Width < 50*vg.Millimeter || opts.Height < 80*vg.Millimeter || opts.Width > 5000*vg.Millimeter || opts.Height > 5000*vg.Millimeter {
		return opts, fmt.Errorf("plot size %.0f × %.0f mm: want 50–5000 mm wide and 80–5000 mm high",
			opts.Width/vg.Millimeter, opts.Height/vg.Millimeter)
	}
	if opts.Columns == 0 {
		opts.Columns = 1200
	}
	if opts.Columns < 10 || opts.Columns > 100000 {
		return opts, fmt.Errorf("plot columns %d: want 10–100000", opts.Columns)
	}
	if opts.DPI == 0 {
		opts.DPI = 150
	}
	if opts.DPI < 30 || opts.DPI > 1200 {
		return opts, fmt.Errorf("plot dpi %d: want 30–1200", opts.DPI)
	}
	if bad := math.IsNaN(opts.FromS) || math.IsInf(opts.FromS, 0) || math.IsNaN(opts.ToS) || math.IsInf(opts.ToS, 0); bad {
		return opts, fmt.Errorf("plot range %g to %g s: want finite times", opts.FromS, opts.ToS)
	}
	if opts.ToS == 0 {
		// No end: to the end of the recording (and, with no start either,
		// from its start).
		lo, hi := extent(&data)
		if math.IsInf(lo, 0) {
			return opts, ErrNoData
		}
		if opts.FromS == 0 {
			opts.FromS = lo
		}
		opts.ToS = hi
	}
	if opts.ToS <= opts.FromS {
		return opts, fmt.Errorf("plot range %g to %g s: the end must come after the start, within the recording", opts.FromS, opts.ToS)
	}
	if opts.Title == "" {
		opts.Title = fmt.Sprintf("stream %s, %.1f to %.1f s", data.Stream, opts.FromS, opts.ToS)
	}
	return opts, nil
}

// extent is the time span of everything in the data.
func extent(d *Data) (lo, hi float64) {
	lo, hi = math.Inf(1), math.Inf(-1)
	see := func(t float64) {
		if !math.IsNaN(t) && !math.IsInf(t, 0) {
			lo, hi = math.Min(lo, t), math.Max(hi, t)
		}
	}
	if n := len(d.Samples); n > 0 {
		see(d.Samples[0].TimeS)
		see(d.Samples[n-1].TimeS)
	}
	for i := range d.Breaths {
		see(d.Breaths[i].StartS)
		see(d.Breaths[i].EndS)
	}
	for i := range d.Alerts {
		see(d.Alerts[i].TS)
	}
	return lo, hi
}

// panel is one plot of the figure and its share of the height.
type panel struct {
	p      *gp.Plot
	weight float64
}

// drawPanels stacks the panels top to bottom, heights by weight, with
// their data areas aligned left and right so that the time axes line up.
func drawPanels(dc draw.Canvas, panels []panel) {
	gap := 3 * vg.Millimeter
	dc = draw.Crop(dc, 2*vg.Millimeter, -5*vg.Millimeter, 2*vg.Millimeter, -2*vg.Millimeter)
	total := 0.0
	for _, p := range panels {
		total += p.weight
	}
	h := dc.Max.Y - dc.Min.Y - gap*vg.Length(len(panels)-1)
	cs := make([]draw.Canvas, len(panels))
	y := dc.Max.Y
	var maxL, maxR vg.Length
	for i, p := range panels {
		hi := h * vg.Length(p.weight/total)
		cs[i] = draw.Canvas{Canvas: dc.Canvas, Rectangle: vg.Rectangle{Min: vg.Point{X: dc.Min.X, Y: y - hi}, Max: vg.Point{X: dc.Max.X, Y: y}}}
		y -= hi + gap
		d := p.p.DataCanvas(cs[i])
		maxL, maxR = max(maxL, d.Min.X-cs[i].Min.X), max(maxR, cs[i].Max.X-d.Max.X)
	}
	for i, p := range panels {
		d := p.p.DataCanvas(cs[i])
		cs[i].Min.X += maxL - (d.Min.X - cs[i].Min.X)
		cs[i].Max.X -= maxR - (cs[i].Max.X - d.Max.X)
		p.p.Draw(cs[i])
	}
}
