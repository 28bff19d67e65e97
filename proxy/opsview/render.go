package opsview

import (
	"fmt"
	"html/template"
	"math"
	"strconv"
	"strings"
	"time"
)

// pageData is what page.html renders.
type pageData struct {
	Snapshot
	RefreshMs int64
}

func funcMap() template.FuncMap {
	return template.FuncMap{
		"usd":     func(s string) string { return "$" + s },
		"pct":     pct,
		"secs":    secs,
		"rawSecs": rawSecs,
		"bar":     bar,
		"clock":   func(t time.Time) string { return t.UTC().Format("15:04:05 UTC") },
		"stamp":   func(t time.Time) string { return t.UTC().Format("2006-01-02 15:04 UTC") },
		"iso":     func(t time.Time) string { return t.UTC().Format(time.RFC3339) },
		"curve":   curveOf,
		"acc": func(x float64) string {
			if x < 0 {
				return "—"
			}
			return pct(x)
		},
		"dollars": func(x float64) string { return "$" + strconv.FormatFloat(x, 'f', 6, 64) },
		"raw":     func(x float64) string { return strconv.FormatFloat(x, 'g', -1, 64) },
		"addf":    func(a, b float64) float64 { return a + b },
		"subf":    func(a, b float64) float64 { return a - b },
		"half":    func(a float64) float64 { return a / 2 },
		"ratio": func(a, b int) float64 {
			if b == 0 {
				return 0
			}
			return float64(a) / float64(b)
		},
		"explain": explainOutcome,
		"deref": func(p *int64) int64 {
			if p == nil {
				return 0
			}
			return *p
		},
	}
}

// explainOutcome says in a few words what a cache outcome means, and how
// the answers' Cache-Status header (RFC 9211) says it.
func explainOutcome(o string) string {
	switch o {
	case "hit":
		return "answered from the cache (Cache-Status: hit)"
	case "shared":
		return "rode on an identical call in flight (collapsed)"
	case "partial":
		return "a batch, part cached, the rest fetched (fwd=partial)"
	case "miss":
		return "fetched upstream and stored (fwd=miss, or fwd=request for a no-cache refresh)"
	case "bypass":
		return "not cacheable (sampled, or caching off), forwarded (fwd=bypass)"
	}
	return ""
}

// pct formats a share as a percentage with one decimal.
func pct(x float64) string { return strconv.FormatFloat(100*x, 'f', 1, 64) + "%" }

// secs formats a latency for people: microseconds, milliseconds or
// seconds, three significant digits; a dash for none.
func secs(p *float64) string {
	if p == nil {
		return "—"
	}
	s := *p
	switch {
	case s < 1e-3:
		return strconv.FormatFloat(s*1e6, 'f', 0, 64) + " µs"
	case s < 1:
		return sig3(s*1e3) + " ms"
	}
	return sig3(s) + " s"
}

func sig3(x float64) string {
	switch {
	case x >= 100:
		return strconv.FormatFloat(x, 'f', 0, 64)
	case x >= 10:
		return strconv.FormatFloat(x, 'f', 1, 64)
	}
	return strconv.FormatFloat(x, 'f', 2, 64)
}

// rawSecs is a latency for machines: the exact float, empty for none.
func rawSecs(p *float64) string {
	if p == nil {
		return ""
	}
	return strconv.FormatFloat(*p, 'g', -1, 64)
}

// bar turns a share into a bar length out of 100, clamped.
func bar(x float64) string {
	if math.IsNaN(x) || x < 0 {
		x = 0
	}
	return strconv.FormatFloat(math.Min(x, 1)*100, 'f', 2, 64)
}

// Curve geometry, in SVG user units.
const (
	curveW, curveH         = 360.0, 150.0
	curveLeft, curveRight  = 34.0, 8.0
	curveTop, curveBottom  = 8.0, 22.0
	curvePlotW, curvePlotH = curveW - curveLeft - curveRight, curveH - curveTop - curveBottom
)

// curve is a learning curve laid out for the page's inline SVG: the
// sampled prompts' training accuracy per step as a line, the greedy
// prompt's dev accuracy as dots joined by a dashed line, both on 0–100%.
type curve struct {
	W, H       float64
	Left, Top  float64
	PlotW      float64
	PlotH      float64
	Train, Dev string // polyline points
	Dots       []dot
	YTicks     []tick
	XTicks     []tick
	Points     int
	Empty      bool
}

type dot struct{ X, Y float64 }

type tick struct {
	At    float64
	Label string
}

func curveOf(s SearchLine) curve {
	c := curve{W: curveW, H: curveH, Left: curveLeft, Top: curveTop, PlotW: curvePlotW, PlotH: curvePlotH, Points: len(s.Curve)}
	for _, y := range []float64{0, 0.5, 1} {
		c.YTicks = append(c.YTicks, tick{At: curveTop + curvePlotH*(1-y), Label: strconv.Itoa(int(100*y)) + "%"})
	}
	if len(s.Curve) == 0 {
		c.Empty = true
		return c
	}
	last := max(s.Steps, s.Curve[len(s.Curve)-1].Step, 1)
	x := func(step int) float64 {
		if last <= 1 {
			return curveLeft + curvePlotW/2
		}
		return curveLeft + curvePlotW*float64(step-1)/float64(last-1)
	}
	y := func(acc float64) float64 { return curveTop + curvePlotH*(1-math.Max(0, math.Min(1, acc))) }
	var train, dev []string
	for _, p := range s.Curve {
		train = append(train, xy(x(p.Step), y(p.TrainAcc)))
		if p.DevAcc >= 0 {
			dev = append(dev, xy(x(p.Step), y(p.DevAcc)))
			c.Dots = append(c.Dots, dot{X: round1(x(p.Step)), Y: round1(y(p.DevAcc))})
		}
	}
	if len(train) == 1 {
		// One step: a short flat stroke, so it shows.
		p := s.Curve[0]
		train = append(train, xy(x(p.Step)+4, y(p.TrainAcc)))
	}
	c.Train, c.Dev = strings.Join(train, " "), strings.Join(dev, " ")
	c.XTicks = []tick{{At: curveLeft, Label: "1"}, {At: curveLeft + curvePlotW, Label: strconv.Itoa(last)}}
	return c
}

func xy(x, y float64) string { return fmt.Sprintf("%.1f,%.1f", x, y) }

func round1(x float64) float64 { return math.Round(x*10) / 10 }
