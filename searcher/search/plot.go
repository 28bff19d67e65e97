package search

import (
	"fmt"
	"image/color"
	"io"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
	"gonum.org/v1/plot/vg/vgsvg"
)

// okabeIto is the Okabe–Ito palette (Okabe and Ito 2008, "Color Universal
// Design (CUD): how to make figures and presentations that are friendly to
// colorblind people", jfly.uni-koeln.de/color), whose eight colours stay
// apart under the common colour-vision deficiencies: black, orange, sky
// blue, bluish green, yellow, blue, vermillion, reddish purple.
var okabeIto = [...]color.RGBA{
	{R: 0x00, G: 0x00, B: 0x00, A: 0xff},
	{R: 0xe6, G: 0x9f, B: 0x00, A: 0xff},
	{R: 0x56, G: 0xb4, B: 0xe9, A: 0xff},
	{R: 0x00, G: 0x9e, B: 0x73, A: 0xff},
	{R: 0xf0, G: 0xe4, B: 0x42, A: 0xff},
	{R: 0x00, G: 0x72, B: 0xb2, A: 0xff},
	{R: 0xd5, G: 0x5e, B: 0x00, A: 0xff},
	{R: 0xcc, G: 0x79, B: 0xa7, A: 0xff},
}

// dashes and glyphs go with the palette, one of each per line, so lines
// stay apart in grey print and for readers who cannot tell the colours.
var (
	dashes = [...][]vg.Length{
		nil, // solid
		{vg.Points(6), vg.Points(3)},
		{vg.Points(2), vg.Points(2)},
		{vg.Points(8), vg.Points(3), vg.Points(2), vg.Points(3)},
		{vg.Points(1), vg.Points(3)},
		{vg.Points(10), vg.Points(4)},
		{vg.Points(4), vg.Points(2), vg.Points(1), vg.Points(2), vg.Points(1), vg.Points(2)},
		{vg.Points(12), vg.Points(2), vg.Points(4), vg.Points(2)},
	}
	glyphs = [...]draw.GlyphDrawer{
		draw.CircleGlyph{}, draw.SquareGlyph{}, draw.TriangleGlyph{}, draw.CrossGlyph{},
		draw.PlusGlyph{}, draw.RingGlyph{}, draw.BoxGlyph{}, draw.PyramidGlyph{},
	}
)

// lineStyle is one line's look on the learning curve.
type lineStyle struct {
	Color  color.RGBA
	Dashes []vg.Length
	Glyph  draw.GlyphDrawer
}

// styleOf is the i-th line's look: the search's greedy curve is line 0,
// the contenders drawn follow in the table's order. Eight lines have eight
// colours, dashes and glyphs; more repeat them, shifted so that no two of
// the first 64 share all three.
func styleOf(i int) lineStyle {
	n := len(okabeIto)
	return lineStyle{Color: okabeIto[i%n], Dashes: dashes[(i+i/n)%n], Glyph: glyphs[(i+2*(i/n))%n]}
}

// plotted says whether contender c has a line of its own on the curve:
// every contender but rl-greedy, whose prompt the curve already follows.
func plotted(c Contender) bool { return c.Method != MethodRLGreedy && c.DevAcc >= 0 }

// Format is an image format of the learning curve.
type Format string

// The formats WritePlot writes.
const (
	PNG Format = "png"
	SVG Format = "svg"
)

// WritePlot draws the learning curve: the step's mean reward on top, the
// greedy prompt's dev accuracy below, with every other contender's dev
// accuracy as a level line; each line has its own colour (Okabe–Ito),
// dash and glyph, and each panel a title.
func WritePlot(w io.Writer, r Results, f Format) error {
	reward := plot.New()
	reward.Title.Text = fmt.Sprintf("%s: prompt search (seed %d)", r.Task, r.Seed)
	reward.Y.Label.Text = "mean reward of sampled prompts"
	reward.X.Label.Text = "step"
	var pts, dev plotter.XYs
	for _, p := range r.History {
		pts = append(pts, plotter.XY{X: float64(p.Step), Y: p.MeanReward})
		if p.DevAcc >= 0 {
			dev = append(dev, plotter.XY{X: float64(p.Step), Y: 100 * p.DevAcc})
		}
	}
	if len(pts) == 0 {
		return fmt.Errorf("search: no history to plot")
	}
	line, err := plotter.NewLine(pts)
	if err != nil {
		return err
	}
	line.Color = styleOf(0).Color
	reward.Add(line, plotter.NewGrid())

	acc := plot.New()
	acc.Title.Text = "dev accuracy: the search's greedy prompt and the baselines"
	acc.Y.Label.Text = "dev accuracy (%)"
	acc.X.Label.Text = "step"
	acc.Y.Min, acc.Y.Max = 0, 100
	acc.Add(plotter.NewGrid())
	if len(dev) > 0 {
		dl, dp, err := plotter.NewLinePoints(dev)
		if err != nil {
			return err
		}
		st := styleOf(0)
		dl.Color, dl.Dashes, dp.Color, dp.Shape = st.Color, st.Dashes, st.Color, st.Glyph
		acc.Add(dl, dp)
		acc.Legend.Add("rl search (greedy prompt)", dl, dp)
	}
	first, last := float64(r.History[0].Step), float64(r.History[len(r.History)-1].Step)
	i := 0
	for _, c := range r.Ranking {
		if !plotted(c) {
			continue
		}
		i++
		st := styleOf(i)
		y := 100 * c.DevAcc
		// A glyph at each end and one placed by the line's number, so
		// lines at the same accuracy still show every glyph.
		at := first + (last-first)*float64(i)/float64(len(r.Ranking)+1)
		bl, bp, err := plotter.NewLinePoints(plotter.XYs{{X: first, Y: y}, {X: at, Y: y}, {X: last, Y: y}})
		if err != nil {
			return err
		}
		bl.Color, bl.Dashes, bp.Color, bp.Shape = st.Color, st.Dashes, st.Color, st.Glyph
		label := c.Method
		if c.Method == MethodRL {
			label = "rl (chosen)"
			bl.Width = vg.Points(2)
		}
		acc.Add(bl, bp)
		acc.Legend.Add(fmt.Sprintf("%s %q", label, c.Prompt), bl, bp)
	}
	acc.Legend.Top = false
	acc.Legend.Left = true

	const width, height = 8 * vg.Inch, 7 * vg.Inch
	var canvas vg.CanvasWriterTo
	switch f {
	case PNG:
		canvas = vgimg.PngCanvas{Canvas: vgimg.New(width, height)}
	case SVG:
		canvas = vgsvg.New(width, height)
	default:
		return fmt.Errorf("search: plot format %q: want png or svg", f)
	}
	dc := draw.New(canvas)
	tiles := draw.Tiles{Rows: 2, Cols: 1, PadX: vg.Millimeter, PadY: 4 * vg.Millimeter, PadTop: 2 * vg.Millimeter, PadBottom: 2 * vg.Millimeter, PadLeft: 2 * vg.Millimeter, PadRight: 4 * vg.Millimeter}
	plots := [][]*plot.Plot{{reward}, {acc}}
	canvases := plot.Align(plots, tiles, dc)
	reward.Draw(canvases[0][0])
	acc.Draw(canvases[1][0])
	_, err = canvas.WriteTo(w)
	return err
}
