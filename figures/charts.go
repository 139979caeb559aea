package figures

import (
	"fmt"
	"html"
	"math"
	"strconv"
)

// DecaySeries is one segment's decay band: Q[j-1] holds the 5%, 25%,
// 50%, 75% and 95% quantiles of the j-th largest relative
// cross-elasticity of a member.
type DecaySeries struct {
	Name   string
	Colour int // palette index
	Q      [][5]float64
	// Reported, when not nil, are one product's reported values
	// (descending), drawn as points over the band.
	Reported []float64
}

// decayFloor is the lowest value a decay panel shows (log axis).
const decayFloor = 1e-3

// DecayChart draws one panel per series (small multiples, at most four
// a row, shared log-scaled y axis): the median of each order statistic
// as a line, its 50% band dark and its 90% band light, and reported
// values as points.
func DecayChart(id, caption string, series []DecaySeries) Figure {
	cols := min(max(len(series), 1), 4)
	rows := max((len(series)+cols-1)/cols, 1)
	pw, ph := 210.0, 170.0
	w, h := 70+float64(cols)*(pw+30), 20+float64(rows)*(ph+62)
	c := newCanvas(w, h, caption)
	lo, hi := math.Inf(1), 0.0
	for _, s := range series {
		for _, q := range s.Q {
			lo, hi = min(lo, q[0]), max(hi, q[4])
		}
		for _, v := range s.Reported {
			lo, hi = min(lo, v), max(hi, v)
		}
	}
	if !(hi > 0) {
		lo, hi = 0.01, 1
	}
	clipped := lo < decayFloor
	lo = max(lo, decayFloor)
	lo, hi = math.Pow(10, math.Floor(math.Log10(lo)*2)/2), math.Pow(10, math.Ceil(math.Log10(hi)*2)/2)
	for k, s := range series {
		col, row := k%cols, k/cols
		f := newFrame(70+float64(col)*(pw+30), 24+float64(row)*(ph+62), pw, ph)
		l := len(s.Q)
		f.x = newScale(0.5, float64(l)+0.5, f.left, f.left+f.width, false)
		f.y = newScale(lo, hi, f.top+f.height, f.top, true)
		var xt []tick
		for j := 1; j <= l; j++ {
			lab := ""
			if j == 1 || j == l || (l <= 12 && j%2 == 1) {
				lab = strconv.Itoa(j)
			}
			xt = append(xt, tick{v: float64(j), label: lab})
		}
		yl := ""
		if col == 0 {
			yl = "relative cross-elasticity (ratio)"
		}
		c.axes(f, "competitor rank (1 = strongest)", yl, xt)
		colour := Colour(s.Colour)
		c.printf(`<g class="series" data-series="%s">`, html.EscapeString(s.Name))
		c.text(f.left+4, f.top-6, "start", s.Name, ` font-weight="600" fill="`+colour+`"`)
		band := func(a, b int, opacity string) {
			var xs, ys []float64
			for j := 0; j < l; j++ {
				xs, ys = append(xs, f.x.at(float64(j+1))), append(ys, f.y.at(clampLog(s.Q[j][b], lo, hi)))
			}
			for j := l - 1; j >= 0; j-- {
				xs, ys = append(xs, f.x.at(float64(j+1))), append(ys, f.y.at(clampLog(s.Q[j][a], lo, hi)))
			}
			c.printf(`<polygon class="band" points="%s" fill="%s" fill-opacity="%s" stroke="none"/>`, points(xs, ys), colour, opacity)
		}
		if l > 0 {
			band(0, 4, "0.18")
			band(1, 3, "0.35")
			var xs, ys []float64
			for j := 0; j < l; j++ {
				xs, ys = append(xs, f.x.at(float64(j+1))), append(ys, f.y.at(clampLog(s.Q[j][2], lo, hi)))
			}
			c.printf(`<polyline class="median" points="%s" fill="none" stroke="%s" stroke-width="2"/>`, points(xs, ys), colour)
		}
		for j, v := range s.Reported {
			c.printf(`<circle class="reported" cx="%.1f" cy="%.1f" r="3.5" fill="#000" stroke="#fff"/>`,
				f.x.at(float64(j+1)), f.y.at(clampLog(v, lo, hi)))
		}
		c.raw(`</g>`)
	}
	if clipped {
		caption += fmt.Sprintf(" Values below %s are drawn on the axis floor.", fmtTick(decayFloor))
	}
	return c.figure(id, caption, len(series))
}

func clampLog(v, lo, hi float64) float64 {
	if math.IsNaN(v) {
		return lo
	}
	return min(max(v, lo), hi)
}

// HeatColumn is one column group of a heatmap (a data series).
type HeatColumn struct {
	Name string
	// Values[r] is the cell of row r, in [0, 1] (NaN for no value).
	Values []float64
}

// Heatmap draws rows x columns cells on the viridis ramp with a colour
// bar. groups marks row groups: groups[g] is the first row of group g
// with its name; lines separate them. Each column is one series.
// With one != "", the whole matrix is one series of that name (a
// co-segment matrix) instead of one per column.
func Heatmap(id, caption, xLabel, yLabel string, cols []HeatColumn, rows int, groups []RowGroup, valueLabel, one string) Figure {
	plotW := min(max(24*float64(len(cols)), 160), 640)
	plotH := min(max(3*float64(rows), 160), 420)
	if one != "" {
		plotW = plotH
	}
	w, h := 110+plotW+90, 30+plotH+50
	c := newCanvas(w, h, caption)
	left, top := 110.0, 20.0
	cw, rh := plotW/float64(max(len(cols), 1)), plotH/float64(max(rows, 1))
	c.printf(`<rect x="%.1f" y="%.1f" width="%.1f" height="%.1f" fill="%s"/>`, left, top, plotW, plotH, Ramp(0))
	colClass, nSeries := "series", len(cols)
	if one != "" {
		c.printf(`<g class="series" data-series="%s">`, html.EscapeString(one))
		colClass, nSeries = "col", 1
	}
	for k, col := range cols {
		c.printf(`<g class="%s" data-series="%s">`, colClass, html.EscapeString(col.Name))
		for r, v := range col.Values {
			if !(v >= 0.005) && !math.IsNaN(v) {
				continue // the background is the ramp's zero
			}
			c.printf(`<rect x="%.2f" y="%.2f" width="%.2f" height="%.2f" fill="%s"/>`,
				left+float64(k)*cw, top+float64(r)*rh, cw+0.3, rh+0.3, Ramp(v))
		}
		c.raw(`</g>`)
		if one == "" && len(cols) <= 40 {
			c.text(left+(float64(k)+0.5)*cw, top+plotH+14, "middle", col.Name, "")
		}
	}
	if one != "" {
		c.raw(`</g>`)
	}
	for g, grp := range groups {
		y := top + float64(grp.Start)*rh
		if g > 0 {
			c.line(left, y, left+plotW, y, `stroke="#fff" stroke-width="1"`)
			if one != "" {
				x := left + float64(grp.Start)*cw
				c.line(x, top, x, top+plotH, `stroke="#fff" stroke-width="1"`)
			}
		}
		end := rows
		if g+1 < len(groups) {
			end = groups[g+1].Start
		}
		if float64(end-grp.Start)*rh >= 9 {
			c.text(left-6, top+(float64(grp.Start+end)/2)*rh+4, "end", grp.Name, "")
		}
	}
	c.printf(`<rect x="%.1f" y="%.1f" width="%.1f" height="%.1f" fill="none" stroke="#999"/>`, left, top, plotW, plotH)
	c.text(left+plotW/2, top+plotH+32, "middle", xLabel, ` class="axis-label"`)
	cx, cy := 24.0, top+plotH/2
	c.printf(`<text x="%.1f" y="%.1f" text-anchor="middle" transform="rotate(-90 %.1f %.1f)" class="axis-label">%s</text>`,
		cx, cy, cx, cy, html.EscapeString(yLabel))
	// Colour bar.
	bx := left + plotW + 24
	for i := 0; i < 50; i++ {
		v := 1 - float64(i)/50
		c.printf(`<rect x="%.1f" y="%.2f" width="12" height="%.2f" fill="%s"/>`, bx, top+float64(i)*plotH/50, plotH/50+0.3, Ramp(v))
	}
	for _, v := range []float64{0, 0.5, 1} {
		c.text(bx+16, top+(1-v)*plotH+4, "start", fmtTick(v), "")
	}
	c.printf(`<text x="%.1f" y="%.1f" text-anchor="middle" transform="rotate(90 %.1f %.1f)" class="axis-label">%s</text>`,
		bx+44, top+plotH/2, bx+44, top+plotH/2, html.EscapeString(valueLabel))
	return c.figure(id, caption, nSeries)
}

// RowGroup names the rows from Start to the next group's start.
type RowGroup struct {
	Name  string
	Start int
}

// LineSeries is one line of a line chart; NaN values leave gaps.
type LineSeries struct {
	Name   string
	Colour int
	Y      []float64
	// Notes, when not nil, are the tooltips of the bars (aligned with Y).
	Notes []string
}

// LineChart draws series over categorical x positions (refits), with
// optional bars (drawn first, grey, in the y unit) such as the moves of
// each refit. ymin0 starts the y axis at 0.
func LineChart(id, caption, xLabel, yLabel string, x []string, series []LineSeries, bars *LineSeries, ymin0 bool) Figure {
	return lineChart(640, id, caption, xLabel, yLabel, x, series, bars, ymin0)
}

func lineChart(w float64, id, caption, xLabel, yLabel string, x []string, series []LineSeries, bars *LineSeries, ymin0 bool) Figure {
	h := 260.0
	c := newCanvas(w, h, caption)
	f := newFrame(70, 34, w-100, h-90)
	lo, hi := math.Inf(1), math.Inf(-1)
	all := series
	if bars != nil {
		all = append(append([]LineSeries(nil), series...), *bars)
	}
	for _, s := range all {
		for _, v := range s.Y {
			if !math.IsNaN(v) && !math.IsInf(v, 0) {
				lo, hi = min(lo, v), max(hi, v)
			}
		}
	}
	if math.IsInf(lo, 1) {
		lo, hi = 0, 1
	}
	if ymin0 {
		lo = min(lo, 0)
	}
	pad := (hi - lo) * 0.05
	if pad == 0 {
		pad = max(math.Abs(hi)*0.1, 0.5)
	}
	if !ymin0 || lo < 0 {
		lo -= pad
	}
	hi += pad
	n := len(x)
	f.x = newScale(-0.5, float64(n)-0.5, f.left, f.left+f.width, false)
	f.y = newScale(lo, hi, f.top+f.height, f.top, false)
	var xt []tick
	fit := max(int((w-100)/75), 2) // refit labels that fit side by side
	every := max(1, (n+fit-1)/fit)
	for i, name := range x {
		lab := ""
		if i%every == 0 {
			lab = name
		}
		xt = append(xt, tick{v: float64(i), label: lab})
	}
	c.axes(f, xLabel, yLabel, xt)
	if bars != nil {
		bw := min(f.width/float64(max(n, 1))*0.6, 18)
		c.printf(`<g class="series bars" data-series="%s">`, html.EscapeString(bars.Name))
		base := f.y.at(max(lo, 0))
		for i, v := range bars.Y {
			if v > 0 {
				y := f.y.at(v)
				note := x[i] + ": " + Num(v)
				if i < len(bars.Notes) && bars.Notes[i] != "" {
					note = bars.Notes[i]
				}
				c.printf(`<rect x="%.1f" y="%.1f" width="%.1f" height="%.1f" fill="#9a9a9a"><title>%s</title></rect>`,
					f.x.at(float64(i))-bw/2, y, bw, base-y, html.EscapeString(note))
			}
		}
		c.raw(`</g>`)
	}
	var names, colours, dashes []string
	for _, s := range series {
		colour, dash := Colour(s.Colour), Dash(s.Colour)
		c.printf(`<g class="series" data-series="%s">`, html.EscapeString(s.Name))
		var xs, ys []float64
		flush := func() {
			if len(xs) > 1 {
				d := ""
				if dash != "" {
					d = ` stroke-dasharray="` + dash + `"`
				}
				c.printf(`<polyline points="%s" fill="none" stroke="%s" stroke-width="2"%s/>`, points(xs, ys), colour, d)
			}
			if len(xs) == 1 {
				c.printf(`<circle cx="%.1f" cy="%.1f" r="3" fill="%s"/>`, xs[0], ys[0], colour)
			}
			xs, ys = xs[:0], ys[:0]
		}
		for i, v := range s.Y {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				flush()
				continue
			}
			xs, ys = append(xs, f.x.at(float64(i))), append(ys, f.y.at(v))
		}
		flush()
		c.raw(`</g>`)
		names, colours, dashes = append(names, s.Name), append(colours, colour), append(dashes, dash)
	}
	if bars != nil {
		names, colours, dashes = append(names, bars.Name), append(colours, "#9a9a9a"), append(dashes, "")
	}
	if len(names) > 1 || bars != nil {
		c.legend(f.left, 16, names, colours, dashes)
	}
	nSeries := len(series)
	if bars != nil {
		nSeries++
	}
	return c.figure(id, caption, nSeries)
}

// CDFChart draws a predictive CDF given by its quantiles: x[i] is the
// u[i]-quantile. The threshold is marked by a vertical line labelled
// with the exceedance probability.
func CDFChart(id, caption string, x, u []float64, threshold, pExceed float64) Figure {
	w, h := 520.0, 260.0
	c := newCanvas(w, h, caption)
	f := newFrame(70, 24, w-100, h-80)
	hi := threshold
	for _, v := range x {
		if !math.IsInf(v, 0) && !math.IsNaN(v) {
			hi = max(hi, v)
		}
	}
	hi *= 1.08
	f.x = newScale(0, hi, f.left, f.left+f.width, false)
	f.y = newScale(0, 1, f.top+f.height, f.top, false)
	c.axes(f, "relative cross-elasticity (ratio) of the strongest unreported competitor", "P(next value ≤ x)", nil)
	xs, ys := []float64{f.x.at(0)}, []float64{f.y.at(0)}
	for i := range x {
		if math.IsInf(x[i], 0) || math.IsNaN(x[i]) {
			continue
		}
		xs, ys = append(xs, f.x.at(x[i])), append(ys, f.y.at(u[i]))
	}
	c.printf(`<g class="series" data-series="predictive CDF"><polyline points="%s" fill="none" stroke="%s" stroke-width="2"/></g>`,
		points(xs, ys), Colour(0))
	tx := f.x.at(threshold)
	c.line(tx, f.top, tx, f.top+f.height, `class="threshold" stroke="`+Colour(3)+`" stroke-width="1.5" stroke-dasharray="5 3"`)
	c.text(f.left, f.top-8, "start", fmt.Sprintf("threshold %s: P(next > threshold) = %s", Num(threshold), Num(pExceed)),
		` fill="`+Colour(3)+`"`)
	return c.figure(id, caption, 1)
}
