package figures

import (
	"fmt"
	"html"
	"html/template"
	"math"
	"strconv"
	"strings"
)

// Figure is one drawn figure: an inline SVG and its one-line caption.
type Figure struct {
	// ID is the figure's element id, unique on a page.
	ID string
	// Caption is the one-line caption (plain text).
	Caption string
	// Series is the number of data series drawn (elements of class
	// "series"), for tests and for the page's legend.
	Series int
	svg    string
	width  float64
}

// HTML returns the figure as an HTML <figure> element.
func (f Figure) HTML() template.HTML {
	return template.HTML(`<figure id="` + html.EscapeString(f.ID) + `" data-series="` + strconv.Itoa(f.Series) +
		`" style="max-width:` + strconv.Itoa(int(f.width)) + `px">` +
		f.svg + `<figcaption>` + html.EscapeString(f.Caption) + `</figcaption></figure>`)
}

// SVG returns the figure's SVG element.
func (f Figure) SVG() string { return f.svg }

// okabeIto is the Okabe-Ito palette (Okabe and Ito 2008, "Color Universal
// Design"), black left out, ordered so that the first colours read well
// as thin lines on white; yellow comes last.
var okabeIto = []string{"#0072B2", "#E69F00", "#009E73", "#D55E00", "#56B4E9", "#CC79A7", "#000000", "#F0E442"}

// Colour returns the palette colour of series i; past the palette's end
// the colours repeat and Dash returns a dash pattern to tell them apart.
func Colour(i int) string { return okabeIto[i%len(okabeIto)] }

// Dash returns the stroke-dasharray of series i ("" for a solid line).
func Dash(i int) string {
	switch (i / len(okabeIto)) % 3 {
	case 1:
		return "6 3"
	case 2:
		return "2 2"
	}
	return ""
}

// viridis anchors, sampled from the viridis colour map (van der Walt and
// Smith, matplotlib 2.0) at 0, 1/8, ..., 1; it is perceptually uniform
// and readable with the common colour-vision deficiencies.
var viridis = [][3]float64{
	{68, 1, 84}, {71, 44, 122}, {59, 81, 139}, {44, 113, 142}, {33, 144, 141},
	{39, 173, 129}, {92, 200, 99}, {170, 220, 50}, {253, 231, 37},
}

// Ramp returns the viridis colour of v in [0, 1] (clamped) as #rrggbb.
func Ramp(v float64) string {
	if math.IsNaN(v) {
		return "#dddddd"
	}
	v = min(max(v, 0), 1)
	t := v * float64(len(viridis)-1)
	i := min(int(t), len(viridis)-2)
	f := t - float64(i)
	var rgb [3]int
	for c := range rgb {
		rgb[c] = int(math.Round(viridis[i][c]*(1-f) + viridis[i+1][c]*f))
	}
	return fmt.Sprintf("#%02x%02x%02x", rgb[0], rgb[1], rgb[2])
}

// scale maps data values to pixels, linearly or on log10.
type scale struct {
	d0, d1 float64 // data range (log10 of it when log)
	p0, p1 float64 // pixel range
	log    bool
}

func newScale(d0, d1, p0, p1 float64, log bool) scale {
	if log {
		d0, d1 = math.Log10(d0), math.Log10(d1)
	}
	if !(d1 > d0) {
		d0, d1 = d0-0.5, d0+0.5
	}
	return scale{d0: d0, d1: d1, p0: p0, p1: p1, log: log}
}

func (s scale) at(v float64) float64 {
	if s.log {
		v = math.Log10(v)
	}
	return s.p0 + (v-s.d0)/(s.d1-s.d0)*(s.p1-s.p0)
}

// ticks returns about n tick values over the scale's range: 1-2-5 steps
// on a linear scale, powers of ten (with 2 and 5 when the range spans
// fewer than three decades) on a log scale.
func (s scale) ticks(n int) []float64 {
	if s.log {
		var out []float64
		lo, hi := math.Floor(s.d0), math.Ceil(s.d1)
		mult := []float64{1}
		if hi-lo < 3 {
			mult = []float64{1, 2, 5}
		}
		for e := lo; e <= hi; e++ {
			for _, m := range mult {
				v := m * math.Pow(10, e)
				if lv := math.Log10(v); lv >= s.d0-1e-9 && lv <= s.d1+1e-9 {
					out = append(out, v)
				}
			}
		}
		return out
	}
	step := niceStep((s.d1 - s.d0) / float64(n))
	var out []float64
	for v := math.Ceil(s.d0/step-1e-9) * step; v <= s.d1+step*1e-9; v += step {
		out = append(out, cleanZero(v))
	}
	return out
}

func cleanZero(v float64) float64 {
	if math.Abs(v) < 1e-12 {
		return 0
	}
	return v
}

// niceStep rounds a raw tick step up to 1, 2 or 5 times a power of ten.
func niceStep(raw float64) float64 {
	if !(raw > 0) || math.IsInf(raw, 0) {
		return 1
	}
	p := math.Pow(10, math.Floor(math.Log10(raw)))
	for _, m := range []float64{1, 2, 5, 10} {
		if m*p >= raw*(1-1e-9) {
			return m * p
		}
	}
	return 10 * p
}

// fmtTick writes a tick value with the fewest digits that show it.
func fmtTick(v float64) string {
	return strconv.FormatFloat(v, 'g', 4, 64)
}

// Num formats a number for a table or caption: three significant digits,
// or a dash when it is not finite.
func Num(v float64) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "–"
	}
	return strconv.FormatFloat(v, 'g', 3, 64)
}

// canvas accumulates the elements of one SVG.
type canvas struct {
	b    strings.Builder
	w, h float64
}

func newCanvas(w, h float64, label string) *canvas {
	c := &canvas{w: w, h: h}
	fmt.Fprintf(&c.b, `<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 %g %g" width="%g" height="%g" role="img" aria-label="%s" font-family="system-ui, sans-serif" font-size="11">`,
		w, h, w, h, html.EscapeString(label))
	return c
}

func (c *canvas) raw(s string) { c.b.WriteString(s) }

func (c *canvas) printf(format string, a ...any) { fmt.Fprintf(&c.b, format, a...) }

func (c *canvas) text(x, y float64, anchor, s string, extra string) {
	c.printf(`<text x="%.1f" y="%.1f" text-anchor="%s"%s>%s</text>`, x, y, anchor, extra, html.EscapeString(s))
}

func (c *canvas) line(x0, y0, x1, y1 float64, style string) {
	c.printf(`<line x1="%.1f" y1="%.1f" x2="%.1f" y2="%.1f" %s/>`, x0, y0, x1, y1, style)
}

func (c *canvas) done() string {
	c.b.WriteString(`</svg>`)
	return c.b.String()
}

// figure wraps the finished canvas.
func (c *canvas) figure(id, caption string, series int) Figure {
	return Figure{ID: id, Caption: caption, Series: series, svg: c.done(), width: c.w}
}

// frame is a plotting area of a canvas with its two scales.
type frame struct {
	x, y                     scale
	left, top, width, height float64
}

func newFrame(left, top, width, height float64) frame {
	return frame{left: left, top: top, width: width, height: height}
}

// axes draws the frame's box, grid lines, ticks and axis labels. xTicks
// may override the x tick positions and labels (categorical axes).
func (c *canvas) axes(f frame, xLabel, yLabel string, xTicks []tick) {
	c.printf(`<rect x="%.1f" y="%.1f" width="%.1f" height="%.1f" fill="none" stroke="#999"/>`, f.left, f.top, f.width, f.height)
	bottom := f.top + f.height
	if xTicks == nil {
		for _, v := range f.x.ticks(6) {
			xTicks = append(xTicks, tick{v: v, label: fmtTick(v)})
		}
	}
	for _, t := range xTicks {
		px := f.x.at(t.v)
		c.line(px, bottom, px, bottom+4, `stroke="#666"`)
		if t.label != "" {
			c.text(px, bottom+15, "middle", t.label, "")
		}
	}
	for _, v := range f.y.ticks(5) {
		py := f.y.at(v)
		c.line(f.left, py, f.left+f.width, py, `stroke="#e5e5e5"`)
		c.line(f.left-4, py, f.left, py, `stroke="#666"`)
		c.text(f.left-6, py+4, "end", fmtTick(v), "")
	}
	if xLabel != "" {
		c.text(f.left+f.width/2, bottom+32, "middle", xLabel, ` class="axis-label"`)
	}
	if yLabel != "" {
		cx, cy := f.left-42, f.top+f.height/2
		c.printf(`<text x="%.1f" y="%.1f" text-anchor="middle" transform="rotate(-90 %.1f %.1f)" class="axis-label">%s</text>`,
			cx, cy, cx, cy, html.EscapeString(yLabel))
	}
}

// tick is one labelled position on an axis.
type tick struct {
	v     float64
	label string
}

// points writes x,y pairs for a polyline or polygon.
func points(xs, ys []float64) string {
	var b strings.Builder
	for i := range xs {
		if i > 0 {
			b.WriteByte(' ')
		}
		fmt.Fprintf(&b, "%.1f,%.1f", xs[i], ys[i])
	}
	return b.String()
}

// legend draws coloured swatches with names in a row from (x, y).
func (c *canvas) legend(x, y float64, names []string, colours []string, dashes []string) {
	for i, n := range names {
		dash := ""
		if dashes != nil && dashes[i] != "" {
			dash = ` stroke-dasharray="` + dashes[i] + `"`
		}
		c.line(x, y-4, x+16, y-4, `stroke="`+colours[i]+`" stroke-width="2.5"`+dash)
		c.text(x+20, y, "start", n, "")
		x += 28 + 6.5*float64(len(n))
		if x > c.w-60 {
			x, y = 60, y+14
		}
	}
}
