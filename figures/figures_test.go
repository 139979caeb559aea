package figures

import (
	"math"
	"math/rand/v2"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"

	"rivalmix/sequential"
	"rivalmix/stream/category"
)

// testPosterior makes a posterior of n products in three point segments
// from d random draws whose labels mostly follow the segments.
func testPosterior(n, d int, seed uint64) *category.Posterior {
	src := rand.New(rand.NewPCG(seed, 1))
	p := &category.Posterior{SegmentIDs: []string{"S1", "S2", "S4"}}
	truth := make([]int, n)
	for i := range truth {
		truth[i] = src.IntN(3)
		p.Products = append(p.Products, "P-"+strconv.Itoa(i+1))
		dt := sequential.MustDatum([]float64{0.5 - 0.1*float64(truth[i]), 0.2}, 10)
		p.Data = append(p.Data, &dt)
	}
	for k := 0; k < d; k++ {
		lab := make([]uint16, n)
		for i := range lab {
			lab[i] = uint16(truth[i])
			if src.Float64() < 0.15 {
				lab[i] = uint16(src.IntN(4))
			}
		}
		segs := make([]sequential.Theta, 4)
		for c := range segs {
			segs[c] = sequential.Theta{LogA: 0.1 * float64(c), LogK: 0.2, LogS: math.Log(0.1 + 0.1*float64(c))}
		}
		p.Draws = append(p.Draws, sequential.Draw{LogWeight: -0.3 * float64(k%3), Labels: lab, Segments: segs, Alpha: 1})
		// Copies, as resampling makes them.
		if k%4 == 0 {
			p.Draws = append(p.Draws, p.Draws[len(p.Draws)-1])
		}
	}
	p.Summary.Partition = truth
	p.Summary.Membership = make([][]float64, n)
	for i := range truth {
		row := make([]float64, 3)
		for c := range row {
			row[c] = src.Float64() * 0.2
		}
		row[truth[i]] = 0.7 + 0.3*src.Float64()
		p.Summary.Membership[i] = row
	}
	return p
}

var cellRE = regexp.MustCompile(`<rect x="([0-9.]+)" y="([0-9.]+)" width="([0-9.]+)" height="([0-9.]+)" fill="(#[0-9a-f]{6})"/>`)

// TestCoSegmentMatchesSimilarityMatrix: with one product per cell, the
// co-segment heatmap's cells are sequential.SimilarityMatrix of the same
// draws (the brute-force N x N computation), compared through the ramp
// colour of each cell; with binned cells each is the mean of the pairs
// of its block, self pairs excluded.
func TestCoSegmentMatchesSimilarityMatrix(t *testing.T) {
	t.Parallel()
	for _, n := range []int{40, 330} {
		p := testPosterior(n, 30, uint64(n))
		sim := sequential.SimilarityMatrix(p.Draws)
		o := orderProducts(p)
		bins, _ := o.bins(maxCoBins)
		if n <= maxCoBins && len(bins) != n {
			t.Fatalf("n=%d: %d bins, want one per product", n, len(bins))
		}
		if len(bins) > maxCoBins {
			t.Fatalf("n=%d: %d bins, more than %d", n, len(bins), maxCoBins)
		}
		want := map[string]int{}
		for a := range bins {
			for b := range bins {
				var s, cnt float64
				for _, i := range bins[a] {
					for _, j := range bins[b] {
						if i != j {
							s += sim[i][j]
							cnt++
						}
					}
				}
				v := 1.0
				if cnt > 0 {
					v = s / cnt
				}
				if v >= 0.005 {
					want[Ramp(v)]++
				}
			}
		}
		fig := CoSegmentHeatmap(p)
		body := fig.SVG()
		body = body[strings.Index(body, `class="series"`):strings.Index(body, "</g></g>")]
		got := map[string]int{}
		for _, m := range cellRE.FindAllStringSubmatch(body, -1) {
			got[m[5]]++
		}
		if len(got) == 0 {
			t.Fatalf("n=%d: no cells drawn", n)
		}
		for c, k := range want {
			if got[c] != k {
				t.Errorf("n=%d: %d cells of colour %s, brute force %d", n, got[c], c, k)
			}
		}
		if fig.Series != 1 {
			t.Errorf("co-segment heatmap has %d series", fig.Series)
		}
	}
}

// TestOrderProducts: rows are grouped by point segment in partition
// order, by membership of the own segment within a group, and bins never
// cross a group boundary.
func TestOrderProducts(t *testing.T) {
	t.Parallel()
	p := testPosterior(900, 2, 5)
	o := orderProducts(p)
	if len(o.rows) != 900 || len(o.groups) != 3 {
		t.Fatalf("%d rows, %d groups", len(o.rows), len(o.groups))
	}
	for g, grp := range o.groups {
		end := len(o.rows)
		if g+1 < len(o.groups) {
			end = o.groups[g+1].Start
		}
		for r := grp.Start; r < end; r++ {
			i := o.rows[r]
			if p.Summary.Partition[i] != g {
				t.Fatalf("row %d (product %d) in group %d of segment %d", r, i, g, p.Summary.Partition[i])
			}
			if r > grp.Start && p.Summary.Membership[i][g] > p.Summary.Membership[o.rows[r-1]][g] {
				t.Fatalf("group %d not ordered by membership at row %d", g, r)
			}
		}
	}
	bins, groups := o.bins(maxHeatRows)
	if len(bins) > maxHeatRows || len(groups) != 3 {
		t.Fatalf("%d bins, %d groups", len(bins), len(groups))
	}
	total := 0
	for _, b := range bins {
		seg := p.Summary.Partition[b[0]]
		for _, i := range b {
			if p.Summary.Partition[i] != seg {
				t.Fatalf("a bin mixes segments %d and %d", seg, p.Summary.Partition[i])
			}
		}
		total += len(b)
	}
	if total != 900 {
		t.Errorf("bins hold %d products", total)
	}
}

// TestRampAndPalette checks the viridis ends (matplotlib's _cm_listed
// viridis table: #440154 at 0, #fde725 at 1) and that the ramp's
// luminance rises monotonically, and the palette's first eight colours
// are the Okabe-Ito set.
func TestRampAndPalette(t *testing.T) {
	t.Parallel()
	if Ramp(0) != "#440154" || Ramp(1) != "#fde725" || Ramp(-1) != Ramp(0) || Ramp(2) != Ramp(1) {
		t.Errorf("ramp ends %s %s", Ramp(0), Ramp(1))
	}
	lum := func(hex string) float64 {
		r, _ := strconv.ParseUint(hex[1:3], 16, 8)
		g, _ := strconv.ParseUint(hex[3:5], 16, 8)
		b, _ := strconv.ParseUint(hex[5:7], 16, 8)
		return 0.2126*float64(r) + 0.7152*float64(g) + 0.0722*float64(b)
	}
	prev := -1.0
	for v := 0.0; v <= 1; v += 0.01 {
		if l := lum(Ramp(v)); l < prev {
			t.Errorf("ramp luminance falls at %v", v)
		} else {
			prev = l
		}
	}
	set := []string{"#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#000000"}
	for i := range 8 {
		if !slices.Contains(set, Colour(i)) {
			t.Errorf("colour %d is %s", i, Colour(i))
		}
	}
	if Colour(8) != Colour(0) || Dash(8) == "" || Dash(0) != "" {
		t.Error("colours past the palette are not told apart by dashes")
	}
	if SegmentColour("S1") != 0 || SegmentColour("S12") != 11 || SegmentColour("x") != 0 {
		t.Error("segment colours")
	}
}

func TestTicks(t *testing.T) {
	t.Parallel()
	for _, tt := range []struct {
		lo, hi float64
		log    bool
		want   []float64
	}{
		{0, 1, false, []float64{0, 0.2, 0.4, 0.6, 0.8, 1}},
		{0, 47, false, []float64{0, 10, 20, 30, 40}},
		{0.001, 1, true, []float64{0.001, 0.01, 0.1, 1}},
		{0.1, 3, true, []float64{0.1, 0.2, 0.5, 1, 2}},
	} {
		got := newScale(tt.lo, tt.hi, 0, 100, tt.log).ticks(5)
		if len(got) != len(tt.want) {
			t.Errorf("ticks(%v, %v) = %v, want %v", tt.lo, tt.hi, got, tt.want)
			continue
		}
		for i := range got {
			if math.Abs(got[i]-tt.want[i]) > 1e-12 {
				t.Errorf("ticks(%v, %v) = %v, want %v", tt.lo, tt.hi, got, tt.want)
				break
			}
		}
	}
}

// TestCharts checks each chart's series, points and labels.
func TestCharts(t *testing.T) {
	t.Parallel()
	q := [][5]float64{{0.5, 0.6, 0.7, 0.8, 0.9}, {0.3, 0.4, 0.5, 0.6, 0.7}, {0.1, 0.2, 0.3, 0.4, 0.5}}
	d := DecayChart("d", "cap", []DecaySeries{{Name: "S1", Q: q, Reported: []float64{0.75, 0.45}}, {Name: "S2", Colour: 1, Q: q}})
	svg := d.SVG()
	if d.Series != 2 || strings.Count(svg, `class="series"`) != 2 || strings.Count(svg, `class="reported"`) != 2 ||
		strings.Count(svg, `class="band"`) != 4 || strings.Count(svg, `class="median"`) != 2 {
		t.Errorf("decay chart: %d series; svg %s", d.Series, svg)
	}
	if !strings.Contains(svg, "competitor rank (1 = strongest)") || !strings.Contains(svg, "relative cross-elasticity") {
		t.Error("decay chart lacks its axis labels")
	}
	l := LineChart("l", "cap", "refit", "products", []string{"W1", "W2", "W3"},
		[]LineSeries{{Name: "S1", Y: []float64{1, math.NaN(), 3}}, {Name: "S2", Y: []float64{2, 2, 2}}},
		&LineSeries{Name: "moves", Y: []float64{0, 4, 1}}, true)
	svg = l.SVG()
	if l.Series != 3 || strings.Count(svg, "<polyline") != 1 || strings.Count(svg, "<circle") != 2 || strings.Count(svg, "<title>") != 2 {
		t.Errorf("line chart: %d series; svg %s", l.Series, svg)
	}
	c := CDFChart("c", "cap", []float64{0.1, 0.2, 0.3}, []float64{0.1, 0.5, 0.9}, 0.25, 0.3)
	if !strings.Contains(c.SVG(), `class="threshold"`) || !strings.Contains(c.SVG(), "P(next &gt; threshold) = 0.3") {
		t.Errorf("CDF chart: %s", c.SVG())
	}
	h := string(d.HTML())
	if !strings.HasPrefix(h, `<figure id="d" data-series="2"`) || !strings.Contains(h, "<figcaption>cap</figcaption>") {
		t.Errorf("figure HTML %s", h)
	}
}

// TestSizesChart: one line per segment id of the history, a gap where a
// segment did not exist, and bars whose tooltips break the moves down by
// segment pair.
func TestSizesChart(t *testing.T) {
	t.Parallel()
	h := []category.RefitPoint{
		{Refit: "W1", Sizes: map[string]int{"S1": 5, "S2": 5}},
		{Refit: "W2", Sizes: map[string]int{"S1": 4, "S10": 6}, Moved: 3, Moves: []category.MoveView{
			{Product: "P-1", From: "S1", To: "S10"}, {Product: "P-2", From: "S2", To: "S10"}, {Product: "P-3", From: "S1", To: "S10"}}},
	}
	f := SizesChart("sizes", h)
	svg := f.SVG()
	if f.Series != 4 || !strings.Contains(svg, `data-series="S10"`) {
		t.Errorf("sizes chart: %d series: %s", f.Series, svg)
	}
	if !strings.Contains(svg, "<title>W2: 3 moved (S1 to S10: 2, S2 to S10: 1)</title>") {
		t.Errorf("bar tooltip: %s", svg)
	}
	// S2 exists only at W1 and S10 only at W2: single points, no lines.
	if strings.Count(svg, "<circle") != 2 || strings.Count(svg, "<polyline") != 1 {
		t.Errorf("gaps: %s", svg)
	}
}
