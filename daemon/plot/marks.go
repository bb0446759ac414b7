package plot

import (
	"bytes"
	"image/color"
	"math"

	gp "gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
)

// tagCanvas passes drawing to an SVG canvas and remembers, for every path
// element the SVG will hold (one per stroke of a visible line, one per
// fill), the class that the plotter drawing it asked for. After the SVG is
// written, classify puts the classes into the elements, so that a reader
// (or a test) can pick out the series, the breath marks and the alarm bands.
type tagCanvas struct {
	vg.Canvas
	widths  []vg.Length // line width per Push level, as the SVG canvas keeps it
	classes []string
	cur     string
}

func newTagCanvas(c vg.Canvas) *tagCanvas {
	return &tagCanvas{Canvas: c, widths: []vg.Length{0}}
}

// SetLineWidth keeps the width the SVG canvas will stroke with.
func (c *tagCanvas) SetLineWidth(w vg.Length) {
	c.widths[len(c.widths)-1] = w
	c.Canvas.SetLineWidth(w)
}

// Push saves the drawing state, as the SVG canvas does.
func (c *tagCanvas) Push() {
	c.widths = append(c.widths, c.widths[len(c.widths)-1])
	c.Canvas.Push()
}

// Pop restores the drawing state saved by Push.
func (c *tagCanvas) Pop() {
	if len(c.widths) > 1 {
		c.widths = c.widths[:len(c.widths)-1]
	}
	c.Canvas.Pop()
}

// Stroke records a path element unless the SVG canvas skips the stroke
// (it writes none for a line width of zero or less).
func (c *tagCanvas) Stroke(p vg.Path) {
	if c.widths[len(c.widths)-1] > 0 {
		c.classes = append(c.classes, c.cur)
	}
	c.Canvas.Stroke(p)
}

// Fill records a path element: the SVG canvas writes one per fill.
func (c *tagCanvas) Fill(p vg.Path) {
	c.classes = append(c.classes, c.cur)
	c.Canvas.Fill(p)
}

// classify adds class attributes to the path elements of svg in the order
// they were drawn. When the count does not match (a gonum/plot that draws
// differently), the SVG is returned unchanged rather than mislabelled.
func (c *tagCanvas) classify(svg []byte) []byte {
	tag := []byte("<path ")
	if bytes.Count(svg, tag) != len(c.classes) {
		return svg
	}
	var out bytes.Buffer
	out.Grow(len(svg) + 24*len(c.classes))
	for _, class := range c.classes {
		i := bytes.Index(svg, tag)
		out.Write(svg[:i+len(tag)])
		if class != "" {
			out.WriteString(`class="` + class + `" `)
		}
		svg = svg[i+len(tag):]
	}
	out.Write(svg)
	return out.Bytes()
}

// withClass sets the class of what draw draws on a tagging canvas.
func withClass(c draw.Canvas, class string, draw func()) {
	t := findTag(c.Canvas)
	if t == nil {
		draw()
		return
	}
	old := t.cur
	t.cur = class
	draw()
	t.cur = old
}

// findTag returns the tagging canvas under v (gonum/plot nests canvases
// in canvases), or nil.
func findTag(v vg.Canvas) *tagCanvas {
	for {
		switch x := v.(type) {
		case *tagCanvas:
			return x
		case draw.Canvas:
			v = x.Canvas
		case *draw.Canvas:
			v = x.Canvas
		default:
			return nil
		}
	}
}

// tagged is a plotter whose elements carry a class in the SVG.
type tagged struct {
	gp.Plotter
	class string
}

// Plot draws the wrapped plotter with its elements in the class.
func (t tagged) Plot(c draw.Canvas, p *gp.Plot) {
	withClass(c, t.class, func() { t.Plotter.Plot(c, p) })
}

// vlines draws one thin vertical line across the data area at each x (the
// breath starts), each its own element.
type vlines struct {
	xs    []float64
	style draw.LineStyle
	class string
}

// Plot draws the lines.
func (v vlines) Plot(c draw.Canvas, p *gp.Plot) {
	trX, _ := p.Transforms(&c)
	withClass(c, v.class, func() {
		for _, x := range v.xs {
			px := trX(x)
			c.StrokeLine2(v.style, px, c.Min.Y, px, c.Max.Y)
		}
	})
}

// dots draws one filled circle per point, each its own element.
type dots struct {
	xy     plotter.XYs
	colour color.Color
	radius vg.Length
	class  string
}

// Plot draws the dots.
func (d dots) Plot(c draw.Canvas, p *gp.Plot) {
	trX, trY := p.Transforms(&c)
	sty := draw.GlyphStyle{Color: d.colour, Radius: d.radius, Shape: draw.CircleGlyph{}}
	withClass(c, d.class, func() {
		for _, pt := range d.xy {
			c.DrawGlyphNoClip(sty, vg.Point{X: trX(pt.X), Y: trY(pt.Y)})
		}
	})
}

// Thumbnail draws the dot in a legend.
func (d dots) Thumbnail(c *draw.Canvas) {
	sty := draw.GlyphStyle{Color: d.colour, Radius: d.radius, Shape: draw.CircleGlyph{}}
	c.DrawGlyph(sty, c.Center())
}

// band is one rectangle of the alarm panel, from x0 to x1 on the time axis
// and from y0 to y1 on the panel's rows.
type band struct {
	x0, x1, y0, y1 float64
	fill           color.Color // nil: outline only
	line           draw.LineStyle
	class          string
}

// bands draws rectangles, each its own element.
type bands []band

// Plot draws the rectangles.
func (bs bands) Plot(c draw.Canvas, p *gp.Plot) {
	trX, trY := p.Transforms(&c)
	for _, b := range bs {
		x0, x1 := trX(b.x0), trX(b.x1)
		if x1-x0 < vg.Points(1) {
			x1 = x0 + vg.Points(1) // an alarm of an instant stays visible
		}
		pts := []vg.Point{{X: x0, Y: trY(b.y0)}, {X: x1, Y: trY(b.y0)}, {X: x1, Y: trY(b.y1)}, {X: x0, Y: trY(b.y1)}}
		withClass(c, b.class, func() {
			if b.fill != nil {
				c.FillPolygon(b.fill, pts)
			} else {
				c.StrokeLines(b.line, append(pts, pts[0]))
			}
		})
	}
}

// swatch is a legend entry: a filled square.
type swatch struct{ colour color.Color }

// Thumbnail draws the swatch in a legend.
func (s swatch) Thumbnail(c *draw.Canvas) {
	side := math.Min(float64(c.Max.X-c.Min.X), float64(c.Max.Y-c.Min.Y))
	ctr := c.Center()
	h := vg.Length(side / 2)
	c.FillPolygon(s.colour, []vg.Point{{X: ctr.X - h, Y: ctr.Y - h}, {X: ctr.X + h, Y: ctr.Y - h}, {X: ctr.X + h, Y: ctr.Y + h}, {X: ctr.X - h, Y: ctr.Y + h}})
}

// DataRange passes the wrapped plotter's data range on, so that the axes
// still fit it.
func (t tagged) DataRange() (xmin, xmax, ymin, ymax float64) {
	if r, ok := t.Plotter.(gp.DataRanger); ok {
		return r.DataRange()
	}
	return math.Inf(1), math.Inf(-1), math.Inf(1), math.Inf(-1)
}

// DataRange makes the axes fit the dots.
func (d dots) DataRange() (xmin, xmax, ymin, ymax float64) { return plotter.XYRange(d.xy) }
