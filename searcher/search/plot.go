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

// Colours of the learning curve: the search in a deep teal, each baseline
// in its own muted tone, dashed.
var (
	searchColor   = color.RGBA{R: 0x0b, G: 0x6e, B: 0x6e, A: 0xff}
	baselineColor = map[string]color.RGBA{
		"empty":     {R: 0x8a, G: 0x8a, B: 0x8a, A: 0xff},
		"manual":    {R: 0xb5, G: 0x6a, B: 0x1d, A: 0xff},
		"random":    {R: 0x6b, G: 0x4c, B: 0x9a, A: 0xff},
		"best-of-n": {R: 0x00, G: 0x72, B: 0xb2, A: 0xff},
		MethodRL:    {R: 0x00, G: 0x9e, B: 0x73, A: 0xff},
		"halving":   {R: 0xcc, G: 0x79, B: 0xa7, A: 0xff},
	}
)

// Format is an image format of the learning curve.
type Format string

// The formats WritePlot writes.
const (
	PNG Format = "png"
	SVG Format = "svg"
)

// WritePlot draws the learning curve: the step's mean reward on top, the
// greedy prompt's dev accuracy below, with the baselines' dev accuracies
// as dashed lines; each panel has a title.
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
	line.Color = searchColor
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
		dl.Color, dp.Color = searchColor, searchColor
		acc.Add(dl, dp)
		acc.Legend.Add("rl search (greedy prompt)", dl)
	}
	first, last := float64(r.History[0].Step), float64(r.History[len(r.History)-1].Step)
	for _, c := range r.Ranking {
		col, ok := baselineColor[c.Method]
		if !ok {
			continue
		}
		bl, err := plotter.NewLine(plotter.XYs{{X: first, Y: 100 * c.DevAcc}, {X: last, Y: 100 * c.DevAcc}})
		if err != nil {
			return err
		}
		bl.Color = col
		bl.Dashes = []vg.Length{vg.Points(4), vg.Points(3)}
		label := c.Method
		if c.Method == MethodRL {
			label = "rl (chosen)"
			bl.Width = vg.Points(2)
		}
		acc.Add(bl)
		acc.Legend.Add(fmt.Sprintf("%s %q", label, c.Prompt), bl)
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
