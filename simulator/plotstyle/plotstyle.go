// Package plotstyle is the look shared by trapline's figures (the sweep
// report and the recording plot): a colour-blind-safe palette, the colours
// of the alarm priorities, and a plot with the house defaults. It holds no
// data and imports only gonum/plot, so any package that draws can use it.
package plotstyle

import (
	"image/color"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
)

// Palette is a colour-blind-safe qualitative palette (Okabe and Ito,
// "Color Universal Design", 2008).
var Palette = []color.RGBA{
	{0, 114, 178, 255},   // blue
	{213, 94, 0, 255},    // vermilion
	{0, 158, 115, 255},   // bluish green
	{204, 121, 167, 255}, // reddish purple
	{230, 159, 0, 255},   // orange
	{86, 180, 233, 255},  // sky blue
	{0, 0, 0, 255},       // black
}

// Named entries of Palette.
var (
	Blue          = Palette[0]
	Vermilion     = Palette[1]
	BluishGreen   = Palette[2]
	ReddishPurple = Palette[3]
	Orange        = Palette[4]
	SkyBlue       = Palette[5]
	Black         = Palette[6]
)

// Colour returns the i-th colour of Palette, wrapping around.
func Colour(i int) color.RGBA { return Palette[i%len(Palette)] }

// WithAlpha returns c with opacity a (0 transparent, 255 opaque).
func WithAlpha(c color.RGBA, a uint8) color.NRGBA { return color.NRGBA{R: c.R, G: c.G, B: c.B, A: a} }

// Priority colours of alarm bands, by IEC 60601-1-8 priority name: three
// colours of Palette that stay apart for the common colour-vision
// deficiencies. They are our own choice, not a monitor's colour code.
var Priority = map[string]color.RGBA{
	"high":   Vermilion,
	"medium": Orange,
	"low":    SkyBlue,
}

// BoundaryGrey is the light grey of breath boundaries and other marks that
// should stay behind the data.
var BoundaryGrey = color.Gray{Y: 185}

// NewPlot returns a plot with a title, axis labels (which carry the units)
// and a grid, legend at the top.
func NewPlot(title, x, y string) *plot.Plot {
	p := plot.New()
	p.Title.Text = title
	p.X.Label.Text = x
	p.Y.Label.Text = y
	p.Add(plotter.NewGrid())
	p.Legend.Top = true
	return p
}
