package report

import (
	"fmt"
	"image/color"
	"io"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
	"gonum.org/v1/plot/vg/vgsvg"

	"sluice/client/history"
)

// The report's own colours: a warm paper ground, dark ink, and chain
// colours picked to stay apart from one another in print and on screen.
var (
	paper    = rgb(0xfb, 0xf8, 0xf1)
	ink      = rgb(0x2b, 0x27, 0x22)
	gridInk  = rgb(0xe6, 0xdf, 0xd0)
	barFill  = rgb(0x8e, 0xb1, 0xa8)
	bandFill = color.NRGBA{R: 0xf0, G: 0xc8, B: 0x7a, A: 0x80}
	accent   = rgb(0x9b, 0x2d, 0x1f)
	lineA    = rgb(0x1d, 0x5c, 0x63)
	lineB    = rgb(0xd9, 0x7b, 0x29)
	chainInk = []color.Color{
		rgb(0x1d, 0x5c, 0x63), // deep teal
		rgb(0xd9, 0x7b, 0x29), // pumpkin
		rgb(0x6d, 0x3b, 0x8c), // violet
		rgb(0x8c, 0x86, 0x1c), // mustard olive
		rgb(0xa8, 0x3a, 0x4b), // raspberry
		rgb(0x44, 0x6f, 0xa6), // cornflower slate
		rgb(0x5e, 0x8a, 0x3a), // moss
		rgb(0x7a, 0x55, 0x34), // walnut
	}
)

func rgb(r, g, b uint8) color.Color { return color.NRGBA{R: r, G: g, B: b, A: 0xff} }

func fade(c color.Color, a uint8) color.Color {
	n := color.NRGBAModel.Convert(c).(color.NRGBA)
	n.A = a
	return n
}

// figure is something drawn onto a canvas of a given size.
type figure struct {
	w, h vg.Length
	draw func(dc draw.Canvas)
}

// save writes the figure as base.png (at 110 dots per inch) and base.svg
// (fonts embedded, so the SVG looks the same anywhere) and returns the
// file names written, relative to dir.
func (f figure) save(dir, base string) ([]string, error) {
	img := vgimg.NewWith(vgimg.UseWH(f.w, f.h), vgimg.UseDPI(110), vgimg.UseBackgroundColor(paper))
	f.draw(draw.New(img))
	if err := writeTo(filepath.Join(dir, base+".png"), vgimg.PngCanvas{Canvas: img}); err != nil {
		return nil, err
	}
	svg := vgsvg.NewWith(vgsvg.UseWH(f.w, f.h), vgsvg.EmbedFonts(true))
	dc := draw.New(svg)
	dc.SetColor(paper)
	dc.Fill(dc.Rectangle.Path())
	f.draw(dc)
	if err := writeTo(filepath.Join(dir, base+".svg"), svg); err != nil {
		return nil, err
	}
	return []string{base + ".png", base + ".svg"}, nil
}

func writeTo(path string, c io.WriterTo) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	if _, err := c.WriteTo(f); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}

// newPlot returns a plot in the report's style.
func newPlot(title, x, y string) *plot.Plot {
	p := plot.New()
	p.BackgroundColor = color.Transparent
	p.Title.Text = title
	p.Title.TextStyle.Color = ink
	p.Title.TextStyle.Font.Size = vg.Points(11)
	p.Title.Padding = vg.Points(4)
	for _, a := range []*plot.Axis{&p.X, &p.Y} {
		a.Color = fade(ink, 0x90)
		a.Label.TextStyle.Color = ink
		a.Label.TextStyle.Font.Size = vg.Points(9)
		a.Tick.Label.Color = fade(ink, 0xc0)
		a.Tick.Label.Font.Size = vg.Points(8)
		a.Tick.Color = fade(ink, 0x90)
		a.Padding = vg.Points(2)
	}
	p.X.Label.Text, p.Y.Label.Text = x, y
	p.X.Tick.Marker, p.Y.Tick.Marker = plainTicks{}, plainTicks{}
	g := plotter.NewGrid()
	g.Vertical.Color, g.Horizontal.Color = gridInk, gridInk
	g.Vertical.Width, g.Horizontal.Width = vg.Points(0.5), vg.Points(0.5)
	p.Add(g)
	p.Legend.TextStyle.Font.Size = vg.Points(8)
	p.Legend.TextStyle.Color = ink
	p.Legend.Top = true
	return p
}

func single(p *plot.Plot, w, h vg.Length) figure {
	return figure{w: w, h: h, draw: func(dc draw.Canvas) { p.Draw(pad(dc, vg.Points(4))) }}
}

func pad(dc draw.Canvas, l vg.Length) draw.Canvas {
	return draw.Crop(dc, l, -l, l, -l)
}

// grid lays plots out in rows and columns; nil entries stay empty.
func grid(plots [][]*plot.Plot, w, h vg.Length) figure {
	return figure{w: w, h: h, draw: func(dc draw.Canvas) {
		rows, cols := len(plots), len(plots[0])
		t := draw.Tiles{Rows: rows, Cols: cols, PadX: vg.Points(6), PadY: vg.Points(6),
			PadTop: vg.Points(4), PadBottom: vg.Points(4), PadLeft: vg.Points(4), PadRight: vg.Points(6)}
		cs := plot.Align(plots, t, dc)
		for i := range plots {
			for j, p := range plots[i] {
				if p != nil {
					p.Draw(cs[i][j])
				}
			}
		}
	}}
}

func line(xys plotter.XYs, c color.Color, width vg.Length, dashed bool) *plotter.Line {
	l, err := plotter.NewLine(xys)
	if err != nil {
		panic("report: " + err.Error())
	}
	l.Color, l.Width = c, width
	if dashed {
		l.Dashes = []vg.Length{vg.Points(4), vg.Points(3)}
	}
	return l
}

// hline is a horizontal line at y across [x0, x1].
func hline(y, x0, x1 float64, c color.Color) *plotter.Line {
	return line(plotter.XYs{{X: x0, Y: y}, {X: x1, Y: y}}, c, vg.Points(1.2), true)
}

// thinIndex returns at most max indices spread evenly over [0, n).
func thinIndex(n, max int) []int {
	step := 1
	if n > max {
		step = (n + max - 1) / max
	}
	var idx []int
	for i := 0; i < n; i += step {
		idx = append(idx, i)
	}
	return idx
}

// tracePlot draws one line per chain of the draws of one parameter
// against the draw's position, thinned to at most 400 points per chain.
func tracePlot(name string, chains [][]float64) *plot.Plot {
	p := newPlot(name+": each chain's draws in order", "kept draw", name)
	idx := thinIndex(len(chains[0]), 400)
	for c, ch := range chains {
		xys := make(plotter.XYs, len(idx))
		for k, t := range idx {
			xys[k] = plotter.XY{X: float64(t + 1), Y: ch[t]}
		}
		l := line(xys, fade(chainInk[c%len(chainInk)], 0xb0), vg.Points(0.7), false)
		p.Add(l)
		if len(chains) <= 8 {
			p.Legend.Add(fmt.Sprintf("chain %d", c), l)
		}
	}
	p.Legend.Top, p.Legend.Left = true, false
	p.Legend.XOffs = vg.Points(-2)
	if len(chains) > 4 {
		p.Legend = plot.NewLegend()
	}
	return p
}

// histPlot draws the pooled draws of one parameter as a histogram with
// the interval shaded and its ends and the median marked.
func histPlot(s Stat, pooled []float64, level float64) *plot.Plot {
	title := fmt.Sprintf("%s: %g%% of draws in [%.4g, %.4g]", s.Name, 100*level, s.Lo, s.Hi)
	p := newPlot(title, s.Name, "density")
	bins := binsFor(pooled)
	h, err := plotter.NewHist(plotter.Values(pooled), bins)
	if err != nil {
		panic("report: " + err.Error())
	}
	// Normalize makes the area under the bars 1: heights are a density.
	h.Normalize(1)
	top := 0.0
	for _, b := range h.Bins {
		top = math.Max(top, b.Weight)
	}
	band, err := plotter.NewPolygon(plotter.XYs{{X: s.Lo, Y: 0}, {X: s.Hi, Y: 0}, {X: s.Hi, Y: top * 1.05}, {X: s.Lo, Y: top * 1.05}})
	if err != nil {
		panic("report: " + err.Error())
	}
	band.Color = bandFill
	band.LineStyle.Width = 0
	p.Add(band)
	h.FillColor = barFill
	h.LineStyle.Color = fade(lineA, 0x60)
	h.LineStyle.Width = vg.Points(0.4)
	p.Add(h)
	for _, x := range []float64{s.Lo, s.Hi} {
		p.Add(line(plotter.XYs{{X: x, Y: 0}, {X: x, Y: top * 1.05}}, accent, vg.Points(1), true))
	}
	med := line(plotter.XYs{{X: s.Median, Y: 0}, {X: s.Median, Y: top * 1.05}}, ink, vg.Points(1.2), false)
	p.Add(med)
	p.Legend.Add(fmt.Sprintf("%g%% interval", 100*level), band)
	p.Legend.Add("median", med)
	p.Y.Min = 0
	return p
}

// binsFor picks a bin count by the rule of Freedman and Diaconis
// (Zeitschrift für Wahrscheinlichkeitstheorie 57, 1981): width 2·IQR/n^⅓,
// kept between 10 and 80 bins.
func binsFor(x []float64) int {
	s := append([]float64(nil), x...)
	sort.Float64s(s)
	iqr := quantile7(s, 0.75) - quantile7(s, 0.25)
	span := s[len(s)-1] - s[0]
	if !(iqr > 0) || !(span > 0) {
		return 10
	}
	w := 2 * iqr / math.Cbrt(float64(len(s)))
	return min(80, max(10, int(math.Ceil(span/w))))
}

// pairGrid draws the leading parameters two by two: histograms on the
// diagonal, thinned scatter plots below it, empty above.
func pairGrid(r *Run, stats []Stat, k int) *figureWithPlots {
	n := r.Len() * r.Chains()
	idx := thinIndex(n, 2500)
	plots := make([][]*plot.Plot, k)
	for i := range k {
		plots[i] = make([]*plot.Plot, k)
		for j := range k {
			switch {
			case i == j:
				p := newPlot("", "", "")
				pooled := pool(r.Draws[i])
				h, err := plotter.NewHist(plotter.Values(pooled), binsFor(pooled))
				if err != nil {
					panic("report: " + err.Error())
				}
				h.FillColor, h.LineStyle.Width = barFill, 0
				p.Add(h)
				p.Title.Text = stats[i].Name
				p.Y.Tick.Marker = plot.ConstantTicks(nil)
				plots[i][j] = p
			case i > j:
				p := newPlot("", "", "")
				xys := make(plotter.XYs, len(idx))
				for k, t := range idx {
					c, d := t/r.Len(), t%r.Len()
					xys[k] = plotter.XY{X: r.Draws[j][c][d], Y: r.Draws[i][c][d]}
				}
				sc, err := plotter.NewScatter(xys)
				if err != nil {
					panic("report: " + err.Error())
				}
				sc.GlyphStyle.Color = fade(lineA, 0x40)
				sc.GlyphStyle.Radius = vg.Points(1.1)
				sc.GlyphStyle.Shape = draw.CircleGlyph{}
				p.Add(sc)
				plots[i][j] = p
			}
			if p := plots[i][j]; p != nil {
				if i == k-1 {
					p.X.Label.Text = stats[j].Name
				}
				if j == 0 && i != j {
					p.Y.Label.Text = stats[i].Name
				}
			}
		}
	}
	side := vg.Length(k) * 2.3 * vg.Inch
	return &figureWithPlots{figure: grid(plots, side, side)}
}

type figureWithPlots struct{ figure }

// overviewPlots draws R-hat and the two ESS of every parameter, one mark
// each, for runs with too many parameters for a panel apiece.
func overviewPlots(stats []Stat, wantRhat, wantESS float64) figure {
	n := len(stats)
	rp := newPlot("R-hat of each parameter (lower is better; 1 at best)", "parameter number", "R-hat")
	ep := newPlot("Effective sample size of each parameter", "parameter number", "draws' worth")
	var rh, bulk, tail plotter.XYs
	for i, s := range stats {
		x := float64(i + 1)
		if !math.IsNaN(s.Rhat) {
			rh = append(rh, plotter.XY{X: x, Y: s.Rhat})
		}
		if !math.IsNaN(s.BulkESS) {
			bulk = append(bulk, plotter.XY{X: x, Y: s.BulkESS})
		}
		if !math.IsNaN(s.TailESS) {
			tail = append(tail, plotter.XY{X: x, Y: s.TailESS})
		}
	}
	dots := func(p *plot.Plot, xys plotter.XYs, c color.Color, shape draw.GlyphDrawer, label string) {
		if len(xys) == 0 {
			return
		}
		sc, err := plotter.NewScatter(xys)
		if err != nil {
			panic("report: " + err.Error())
		}
		sc.GlyphStyle.Color, sc.GlyphStyle.Shape, sc.GlyphStyle.Radius = c, shape, vg.Points(1.8)
		p.Add(sc)
		if label != "" {
			p.Legend.Add(label, sc)
		}
	}
	dots(rp, rh, lineA, draw.CircleGlyph{}, "")
	dots(ep, bulk, lineA, draw.CircleGlyph{}, "bulk")
	dots(ep, tail, lineB, draw.TriangleGlyph{}, "tail")
	if wantRhat > 0 {
		l := hline(wantRhat, 0.5, float64(n)+0.5, accent)
		rp.Add(l)
		rp.Legend.Add(fmt.Sprintf("aim: below %g", wantRhat), l)
	}
	if wantESS > 0 {
		l := hline(wantESS, 0.5, float64(n)+0.5, accent)
		ep.Add(l)
		ep.Legend.Add(fmt.Sprintf("aim: above %g", wantESS), l)
	}
	ep.Y.Min = 0
	// Headroom above the highest mark and the aim, for the legend.
	top := func(xys plotter.XYs, aim float64) float64 {
		m := aim
		for _, v := range xys {
			m = math.Max(m, v.Y)
		}
		return m
	}
	if m := top(rh, wantRhat); m > 1 {
		rp.Y.Max = m + 0.15*(m-math.Min(1, rp.Y.Min))
	}
	ep.Y.Max = 1.2 * math.Max(top(bulk, wantESS), top(tail, 0))
	return grid([][]*plot.Plot{{rp}, {ep}}, 9*vg.Inch, 6*vg.Inch)
}

// runningPlots draws the history against evaluations spent: R-hat,
// effective sample size, Stein discrepancy (with a band of ±2 standard
// errors, or up to its upper bound, when recorded) and the bound, each
// with its target as a dashed line. It returns nil when the history has
// nothing to draw.
func runningPlots(recs []history.Record) *figure {
	var rhat, bulk, tail, ksd, ksdLo, ksdHi, bound plotter.XYs
	var boundLabel string
	perParam := map[string]plotter.XYs{}
	var order []string
	targets := map[string]float64{}
	minX, maxX := math.Inf(1), math.Inf(-1)
	for _, r := range recs {
		x := float64(r.EvaluationsUsed)
		minX, maxX = math.Min(minX, x), math.Max(maxX, x)
		if r.WorstRhat.Valid() {
			rhat = append(rhat, plotter.XY{X: x, Y: float64(r.WorstRhat)})
		}
		b, t := math.Inf(1), math.Inf(1)
		for _, p := range r.Params {
			if p.BulkESS.Valid() {
				b = math.Min(b, float64(p.BulkESS))
			}
			if p.TailESS.Valid() {
				t = math.Min(t, float64(p.TailESS))
			}
			if p.Rhat.Valid() {
				if _, ok := perParam[p.Name]; !ok {
					order = append(order, p.Name)
				}
				perParam[p.Name] = append(perParam[p.Name], plotter.XY{X: x, Y: float64(p.Rhat)})
			}
		}
		if !math.IsInf(b, 1) {
			bulk = append(bulk, plotter.XY{X: x, Y: b})
		}
		if !math.IsInf(t, 1) {
			tail = append(tail, plotter.XY{X: x, Y: t})
		}
		if s := r.Stein; s != nil && s.Value.Valid() && s.Value >= 0 {
			v := float64(s.Value)
			ksd = append(ksd, plotter.XY{X: x, Y: v})
			switch {
			case s.SE.Valid():
				ksdLo = append(ksdLo, plotter.XY{X: x, Y: math.Max(0, v-2*float64(s.SE))})
				ksdHi = append(ksdHi, plotter.XY{X: x, Y: v + 2*float64(s.SE)})
			case s.Upper.Valid():
				ksdLo = append(ksdLo, plotter.XY{X: x, Y: v})
				ksdHi = append(ksdHi, plotter.XY{X: x, Y: float64(s.Upper)})
			}
		}
		if b := r.Bound; b != nil && b.Value.Valid() {
			bound = append(bound, plotter.XY{X: x, Y: float64(b.Value)})
			boundLabel = strings.ToUpper(b.Metric) + " bound"
			if b.Guaranteed {
				boundLabel += " (guaranteed)"
			} else {
				boundLabel += " (estimated)"
			}
		}
		for _, t := range r.Targets {
			if t.Want.Valid() {
				targets[t.Name] = float64(t.Want)
			}
		}
	}
	target := func(p *plot.Plot, key, verb string) {
		for name, v := range targets {
			if strings.Contains(name, key) {
				l := hline(v, minX, maxX, accent)
				p.Add(l)
				p.Legend.Add(fmt.Sprintf("aim: %s %g", verb, v), l)
				return
			}
		}
	}
	const xl = "evaluations spent"
	var panels []*plot.Plot
	if len(rhat) > 0 {
		p := newPlot("R-hat as the run went on", xl, "R-hat")
		if len(order) <= 12 {
			for i, name := range order {
				p.Add(line(perParam[name], fade(chainInk[(i+2)%len(chainInk)], 0x70), vg.Points(0.7), false))
			}
		}
		l := line(rhat, lineA, vg.Points(1.6), false)
		p.Add(l)
		p.Legend.Add("worst parameter", l)
		target(p, "rhat", "below")
		p.Y.Min = math.Min(p.Y.Min, 1)
		panels = append(panels, p)
	}
	if len(bulk)+len(tail) > 0 {
		p := newPlot("Effective sample size (smallest over parameters)", xl, "draws' worth")
		if len(bulk) > 0 {
			l := line(bulk, lineA, vg.Points(1.6), false)
			p.Add(l)
			p.Legend.Add("bulk", l)
		}
		if len(tail) > 0 {
			l := line(tail, lineB, vg.Points(1.6), false)
			p.Add(l)
			p.Legend.Add("tail", l)
		}
		target(p, "ess", "above")
		p.Legend.Left = true
		p.Y.Min = 0
		panels = append(panels, p)
	}
	if len(ksd) > 0 {
		p := newPlot("Kernel Stein discrepancy of the kept draws", xl, "discrepancy")
		if len(ksdLo) > 1 {
			band := append(append(plotter.XYs{}, ksdLo...), reversed(ksdHi)...)
			poly, err := plotter.NewPolygon(band)
			if err == nil {
				poly.Color, poly.LineStyle.Width = bandFill, 0
				p.Add(poly)
				p.Legend.Add("uncertainty", poly)
			}
		}
		l := line(ksd, lineA, vg.Points(1.6), false)
		p.Add(l)
		p.Legend.Add("measured", l)
		target(p, "ksd", "below")
		p.Y.Min = 0
		panels = append(panels, p)
	}
	if len(bound) > 0 {
		p := newPlot("Bound on the distance to the target law", xl, "distance")
		l := line(bound, lineB, vg.Points(1.6), false)
		p.Add(l)
		p.Legend.Add(boundLabel, l)
		target(p, "eps", "below")
		p.Y.Min = 0
		panels = append(panels, p)
	}
	if len(panels) == 0 {
		return nil
	}
	cols := min(2, len(panels))
	rows := (len(panels) + cols - 1) / cols
	g := make([][]*plot.Plot, rows)
	for i := range g {
		g[i] = make([]*plot.Plot, cols)
	}
	for k, p := range panels {
		g[k/cols][k%cols] = p
	}
	f := grid(g, vg.Length(cols)*4.6*vg.Inch, vg.Length(rows)*3.1*vg.Inch)
	return &f
}

func reversed(x plotter.XYs) plotter.XYs {
	out := make(plotter.XYs, len(x))
	for i, v := range x {
		out[len(x)-1-i] = v
	}
	return out
}

// plainTicks puts about five labelled ticks at round values (1, 2, 2.5 or
// 5 times a power of ten apart), with unlabelled ones between, and writes
// the labels with the fewest decimals that still give each value
// exactly: 25000, not 25000.00; 0.75, not 0.8.
type plainTicks struct{}

func (plainTicks) Ticks(lo, hi float64) []plot.Tick {
	if !(hi > lo) || math.IsInf(hi-lo, 0) {
		return plot.DefaultTicks{}.Ticks(lo, hi)
	}
	raw := (hi - lo) / 5
	mag := math.Pow(10, math.Floor(math.Log10(raw)))
	step, minor := 10*mag, 5
	for _, c := range []struct {
		m     float64
		minor int
	}{{1, 5}, {2, 4}, {2.5, 5}, {5, 5}} {
		if c.m*mag >= raw {
			step, minor = c.m*mag, c.minor
			break
		}
	}
	var ts []plot.Tick
	first := math.Ceil(lo/step - 1e-9)
	for k := first; k*step <= hi+1e-9*step; k++ {
		ts = append(ts, plot.Tick{Value: k * step, Label: "x"})
	}
	sub := step / float64(minor)
	for k := math.Ceil(lo/sub - 1e-9); k*sub <= hi+1e-9*sub; k++ {
		if math.Abs(math.Remainder(k*sub, step)) > 1e-6*step {
			ts = append(ts, plot.Tick{Value: k * sub})
		}
	}
	tol := 1e-9 * math.Max(math.Abs(lo), math.Abs(hi))
	prec := 0
	for ; prec < 12; prec++ {
		exact := true
		for _, t := range ts {
			if t.Label == "" {
				continue
			}
			v, _ := strconv.ParseFloat(strconv.FormatFloat(t.Value, 'f', prec, 64), 64)
			if math.Abs(v-t.Value) > tol {
				exact = false
				break
			}
		}
		if exact {
			break
		}
	}
	for i := range ts {
		if ts[i].Value == 0 {
			ts[i].Value = 0 // not −0, which would be labelled "-0"
		}
		if ts[i].Label != "" {
			ts[i].Label = strconv.FormatFloat(ts[i].Value, 'f', prec, 64)
		}
	}
	return ts
}
