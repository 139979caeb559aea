package figures

import (
	"cmp"
	"errors"
	"fmt"
	"hash/maphash"
	"math"
	"slices"
	"strconv"
	"strings"

	"rivalmix/sequential"
	"rivalmix/stream/category"
)

// DecayProbs are the probabilities of the decay bands: the 90% band, the
// 50% band and the median.
var DecayProbs = []float64{0.05, 0.25, 0.5, 0.75, 0.95}

// maxHeatRows bounds the rows of the membership heatmap; beyond it
// neighbouring products of one segment share a row (their mean).
const maxHeatRows = 400

// maxCoBins bounds the rows and columns of the co-segment heatmap.
const maxCoBins = 150

// DefaultCoSegmentLimit is the largest category whose co-segment heatmap
// is drawn.
const DefaultCoSegmentLimit = 2000

// SegmentColour returns the palette index of a segment id: S1 gets the
// first colour, S2 the second and so on, so a segment keeps its colour
// in every figure and refit.
func SegmentColour(id string) int {
	n, err := strconv.Atoi(strings.TrimLeft(id, "S"))
	if err != nil || n < 1 {
		return 0
	}
	return n - 1
}

// Bands returns the decay bands of a refit's point segments, by segment
// id.
func Bands(p *category.Posterior) (map[string][][5]float64, error) {
	if p == nil {
		return nil, errors.New("figures: no posterior")
	}
	bands, err := sequential.DecayBands(p.Draws, p.Data, p.Summary.Partition, len(p.SegmentIDs), DecayProbs)
	if err != nil {
		return nil, fmt.Errorf("figures: decay bands: %w", err)
	}
	out := make(map[string][][5]float64, len(bands))
	for c, b := range bands {
		q := make([][5]float64, len(b.Q))
		for j, row := range b.Q {
			copy(q[j][:], row)
		}
		out[p.SegmentIDs[c]] = q
	}
	return out, nil
}

// ordering is the products of a refit grouped by point segment (largest
// segment first) and, within a segment, by membership of it, highest
// first, ties in id order.
type ordering struct {
	rows   []int      // product indices in display order
	groups []RowGroup // group starts in rows
}

func orderProducts(p *category.Posterior) ordering {
	k := len(p.SegmentIDs)
	bySeg := make([][]int, k)
	for i, c := range p.Summary.Partition {
		bySeg[c] = append(bySeg[c], i)
	}
	var o ordering
	for c, mem := range bySeg {
		slices.SortFunc(mem, func(a, b int) int {
			if r := cmp.Compare(p.Summary.Membership[b][c], p.Summary.Membership[a][c]); r != 0 {
				return r
			}
			return category.CompareIDs(p.Products[a], p.Products[b])
		})
		o.groups = append(o.groups, RowGroup{Name: p.SegmentIDs[c], Start: len(o.rows)})
		o.rows = append(o.rows, mem...)
	}
	return o
}

// bins splits the ordered products into at most max bins that never
// cross a segment boundary: bins[b] lists the products of bin b.
func (o ordering) bins(max int) ([][]int, []RowGroup) {
	size := (len(o.rows) + max - 1) / max
	size = cmp.Or(size, 1)
	for {
		var bins [][]int
		var groups []RowGroup
		for g, grp := range o.groups {
			end := len(o.rows)
			if g+1 < len(o.groups) {
				end = o.groups[g+1].Start
			}
			groups = append(groups, RowGroup{Name: grp.Name, Start: len(bins)})
			for s := grp.Start; s < end; s += size {
				bins = append(bins, o.rows[s:min(s+size, end)])
			}
		}
		if len(bins) <= max || size >= len(o.rows) {
			return bins, groups
		}
		size++
	}
}

// MembershipHeatmap draws products x segments memberships.
func MembershipHeatmap(p *category.Posterior) Figure {
	o := orderProducts(p)
	bins, groups := o.bins(maxHeatRows)
	cols := make([]HeatColumn, len(p.SegmentIDs))
	for c, id := range p.SegmentIDs {
		cols[c] = HeatColumn{Name: id, Values: make([]float64, len(bins))}
		for b, mem := range bins {
			var s float64
			for _, i := range mem {
				s += p.Summary.Membership[i][c]
			}
			cols[c].Values[b] = s / float64(len(mem))
		}
	}
	ylab := "product (grouped by point segment)"
	caption := fmt.Sprintf("Membership of each of the %d products in each segment: mean posterior chance of sharing a segment with its members; rows grouped by point segment, highest membership first.", len(p.Products))
	if len(bins) < len(p.Products) {
		ylab = "products (mean of neighbouring rows)"
		caption = fmt.Sprintf("Membership of the %d products (%d rows, each the mean of up to %d neighbours of one segment) in each segment; rows grouped by point segment, highest membership first.",
			len(p.Products), len(bins), len(bins[0]))
	}
	return Heatmap("membership", caption, "segment", ylab, cols, len(bins), groups, "membership (probability)", "")
}

// CoSegmentHeatmap draws the posterior probability that two products
// share a segment, products ordered as in the membership heatmap and
// binned to at most 150 x 150 cells. It reads the draws' labels: for
// each distinct partition, the pairs of each bin pair that share a
// segment, so no N x N matrix is formed.
func CoSegmentHeatmap(p *category.Posterior) Figure {
	o := orderProducts(p)
	bins, groups := o.bins(maxCoBins)
	nb := len(bins)
	binOf := make([]int, len(p.Products))
	for b, mem := range bins {
		for _, i := range mem {
			binOf[i] = b
		}
	}
	w := sequential.NormalizedWeights(p.Draws)
	// Merge draws with equal labels (copies made by resampling).
	seed := maphash.MakeSeed()
	type part struct {
		labels []uint16
		w      float64
	}
	var parts []part
	index := map[uint64][]int{}
	for d, dr := range p.Draws {
		if w[d] == 0 {
			continue
		}
		h := maphash.Bytes(seed, u16bytes(dr.Labels))
		found := false
		for _, at := range index[h] {
			if slices.Equal(parts[at].labels, dr.Labels) {
				parts[at].w += w[d]
				found = true
				break
			}
		}
		if !found {
			index[h] = append(index[h], len(parts))
			parts = append(parts, part{labels: dr.Labels, w: w[d]})
		}
	}
	sum := make([]float64, nb*nb)
	for _, pt := range parts {
		lab := map[uint16]int{}
		for _, l := range pt.labels {
			if _, ok := lab[l]; !ok {
				lab[l] = len(lab)
			}
		}
		nl := len(lab)
		cnt := make([]float64, nb*nl)
		for i, l := range pt.labels {
			cnt[binOf[i]*nl+lab[l]]++
		}
		for a := 0; a < nb; a++ {
			ra := cnt[a*nl : (a+1)*nl]
			for b := a; b < nb; b++ {
				rb := cnt[b*nl : (b+1)*nl]
				var s float64
				for l := range ra {
					s += ra[l] * rb[l]
				}
				sum[a*nb+b] += pt.w * s
			}
		}
	}
	cols := make([]HeatColumn, nb)
	for b := range cols {
		cols[b] = HeatColumn{Name: strconv.Itoa(b), Values: make([]float64, nb)}
	}
	for a := 0; a < nb; a++ {
		na := float64(len(bins[a]))
		for b := a; b < nb; b++ {
			nbb := float64(len(bins[b]))
			v := sum[a*nb+b] / (na * nbb)
			if a == b {
				v = 1
				if na > 1 {
					v = (sum[a*nb+a] - na) / (na * (na - 1)) // without self pairs
				}
			}
			v = min(max(v, 0), 1)
			cols[a].Values[b], cols[b].Values[a] = v, v
		}
	}
	caption := fmt.Sprintf("Posterior probability that two products share a segment, %d products ordered as in the membership heatmap.", len(p.Products))
	if nb < len(p.Products) {
		caption = fmt.Sprintf("Posterior probability that two products share a segment: %d products in %d x %d cells (mean over the pairs of each cell), ordered as in the membership heatmap.",
			len(p.Products), nb, nb)
	}
	return Heatmap("cosegment", caption, "product (grouped by point segment)", "product (grouped by point segment)",
		cols, nb, groups, "probability of sharing a segment", "co-segment")
}

func u16bytes(x []uint16) []byte {
	b := make([]byte, 2*len(x))
	for i, v := range x {
		b[2*i], b[2*i+1] = byte(v), byte(v>>8)
	}
	return b
}

// NextCDF returns the quantiles of product i's next unreported value at
// a grid of probabilities; ok is false when every candidate was reported.
func NextCDF(p *category.Posterior, i int) (x, u []float64, ok bool) {
	w := sequential.NormalizedWeights(p.Draws)
	mix := sequential.NextValueMixture(p.Draws, w, p.Data[i], i)
	if !mix.Defined() {
		return nil, nil, false
	}
	u = []float64{0.005, 0.01, 0.025}
	for v := 0.05; v < 0.96; v += 0.05 {
		u = append(u, math.Round(v*100)/100)
	}
	u = append(u, 0.975, 0.99, 0.995)
	x = make([]float64, len(u))
	for k, v := range u {
		x[k] = mix.Quantile(v)
	}
	return x, u, true
}

// segmentIDs returns every segment id of the history's sizes, in id
// order.
func segmentIDs(h []category.RefitPoint) []string {
	seen := map[string]bool{}
	var ids []string
	for _, pt := range h {
		for id := range pt.Sizes {
			if !seen[id] {
				seen[id] = true
				ids = append(ids, id)
			}
		}
	}
	slices.SortFunc(ids, category.CompareIDs)
	return ids
}

// SizesChart draws segment sizes over the refits of h with the number of
// moves of each refit as bars.
func SizesChart(id string, h []category.RefitPoint) Figure {
	x := make([]string, len(h))
	moves := LineSeries{Name: "moves", Y: make([]float64, len(h)), Notes: make([]string, len(h))}
	for r, pt := range h {
		x[r] = pt.Refit
		moves.Y[r] = float64(pt.Moved)
		moves.Notes[r] = moveNote(pt)
	}
	var series []LineSeries
	for _, sid := range segmentIDs(h) {
		s := LineSeries{Name: sid, Colour: SegmentColour(sid), Y: make([]float64, len(h))}
		for r, pt := range h {
			n, ok := pt.Sizes[sid]
			s.Y[r] = math.NaN()
			if ok {
				s.Y[r] = float64(n)
			}
		}
		series = append(series, s)
	}
	return LineChart(id, fmt.Sprintf("Products in each point segment over %d refits (lines; a gap where a segment did not exist) and products reported as moved at each refit (grey bars).", len(h)),
		"refit", "products", x, series, &moves, true)
}

// OperatorCharts draws the ESS, the distinct partitions and the mean
// surprise over the refits of h.
func OperatorCharts(h []category.RefitPoint) []Figure {
	x := make([]string, len(h))
	ess := LineSeries{Name: "ESS", Y: make([]float64, len(h))}
	dist := LineSeries{Name: "distinct states", Colour: 1, Y: make([]float64, len(h))}
	sur := LineSeries{Name: "mean surprise", Colour: 2, Y: make([]float64, len(h))}
	for r, pt := range h {
		x[r] = pt.Refit
		ess.Y[r] = float64(pt.ESS)
		dist.Y[r] = float64(pt.Distinct)
		sur.Y[r] = float64(pt.MeanSurprise)
		if !pt.MeanSurprise.Defined() {
			sur.Y[r] = math.NaN()
		}
	}
	return []Figure{
		lineChart(420, "ess", "Effective sample size of the particle weights after each refit.", "refit", "ESS (particles)", x, []LineSeries{ess}, nil, true),
		lineChart(420, "distinct", "Distinct partitions among the particles after each refit (the diversity watch's count).", "refit", "distinct states (count)", x, []LineSeries{dist}, nil, true),
		lineChart(420, "surprise", "Mean negative log predictive density of the data each refit changed; a rise means the data drifted from the model.", "refit", "mean surprise (nats)", x, []LineSeries{sur}, nil, false),
	}
}

// MembershipOverRefits draws a product's membership of each segment it
// reached at least 0.05 in, over the refits of h.
func MembershipOverRefits(id, product string, h []category.RefitPoint) Figure {
	x := make([]string, len(h))
	best := map[string]float64{}
	for r, pt := range h {
		x[r] = pt.Refit
		for sid, q := range pt.Membership[product] {
			best[sid] = max(best[sid], float64(q))
		}
	}
	var ids []string
	for sid, q := range best {
		if q >= 0.05 {
			ids = append(ids, sid)
		}
	}
	slices.SortFunc(ids, category.CompareIDs)
	var series []LineSeries
	for _, sid := range ids {
		s := LineSeries{Name: sid, Colour: SegmentColour(sid), Y: make([]float64, len(h))}
		for r, pt := range h {
			row, ok := pt.Membership[product]
			switch {
			case pt.Membership == nil || !ok:
				s.Y[r] = math.NaN() // not kept (before a restart) or not present
			default:
				s.Y[r] = float64(row[sid])
			}
		}
		series = append(series, s)
	}
	return LineChart(id, fmt.Sprintf("Membership of %s in each segment it reached at least 0.05 in, over the refits kept in memory.", product),
		"refit", "membership (probability)", x, series, nil, true)
}

// moveNote says how many products moved between which segments at a
// refit, for the bar's tooltip: "2026-W43: 20 moved (S1 to S3: 8, ...)".
func moveNote(pt category.RefitPoint) string {
	if len(pt.Moves) == 0 {
		return "" // none, or not kept since a restart: the bar says the count
	}
	count := map[[2]string]int{}
	var pairs [][2]string
	for _, m := range pt.Moves {
		k := [2]string{m.From, m.To}
		if count[k] == 0 {
			pairs = append(pairs, k)
		}
		count[k]++
	}
	slices.SortFunc(pairs, func(a, b [2]string) int {
		if c := cmp.Compare(count[b], count[a]); c != 0 {
			return c
		}
		if c := category.CompareIDs(a[0], b[0]); c != 0 {
			return c
		}
		return category.CompareIDs(a[1], b[1])
	})
	parts := make([]string, len(pairs))
	for i, k := range pairs {
		parts[i] = fmt.Sprintf("%s to %s: %d", k[0], k[1], count[k])
	}
	return fmt.Sprintf("%s: %d moved (%s)", pt.Refit, len(pt.Moves), strings.Join(parts, ", "))
}
